"""Catalog mirrors as an administrator's step: ``hushql mirrors`` builds them with its own DSN
and removes unused ones; ``serve`` without --mirror-admin creates none and uses those made."""

from __future__ import annotations

import uuid
from collections.abc import Iterator

import psycopg
import pytest
from psycopg import sql
from psycopg.conninfo import conninfo_to_dict, make_conninfo

from proxy.demo import load_scenario
from proxy.mirrors import expected_mirrors, mirror_label, serving_catalog
from proxy.policy import load_policies
from proxy.wire.catalog import MIRROR_PREFIX
from tests.proxy_fixtures import DEMO_POLICIES, HOUSEHOLDS
from tests.test_cli import hushql


@pytest.fixture
def plain_backend(fresh_dsn: str) -> Iterator[str]:
    """A DSN for a login role that may read the demo tables but create nothing (trust auth
    on the test server is assumed, as for the other tests)."""
    load_scenario(fresh_dsn, households=HOUSEHOLDS, progress=False)
    role = f"hushql_plain_{uuid.uuid4().hex[:8]}"
    ident = sql.Identifier(role)
    with psycopg.connect(fresh_dsn, autocommit=True) as conn:
        conn.execute(sql.SQL("CREATE ROLE {} LOGIN NOCREATEDB NOCREATEROLE").format(ident))
        conn.execute(sql.SQL("GRANT USAGE ON SCHEMA utility TO {}").format(ident))
        conn.execute(sql.SQL("GRANT SELECT ON ALL TABLES IN SCHEMA utility TO {}").format(ident))
        conn.execute(sql.SQL("GRANT USAGE, CREATE ON SCHEMA public TO {}").format(ident))
    params = conninfo_to_dict(fresh_dsn)
    params["user"] = role
    yield make_conninfo(**params)
    with psycopg.connect(fresh_dsn, autocommit=True) as conn:
        database = conn.execute("SELECT current_database()").fetchone()[0]  # type: ignore[index]
        for name in expected_mirrors(load_policies(DEMO_POLICIES), database):
            conn.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(
                sql.Identifier(name)))
        conn.execute(sql.SQL("DROP OWNED BY {}").format(ident))
        conn.execute(sql.SQL("DROP ROLE {}").format(ident))


def test_serve_without_a_mirror_admin_creates_nothing_and_refuses_catalog_questions(
        plain_backend: str) -> None:
    policies = load_policies(DEMO_POLICIES)
    catalog = serving_catalog(policies, plain_backend, None)
    assert catalog.unavailable is not None and "hushql mirrors" in catalog.unavailable
    with psycopg.connect(plain_backend) as conn:
        database = conn.execute("SELECT current_database()").fetchone()[0]  # type: ignore[index]
        made = conn.execute("SELECT count(*) FROM pg_database WHERE datname = ANY (%s)",
                            [sorted(expected_mirrors(policies, database))]).fetchone()
    assert made == (0,)


def test_mirrors_command_provisions_for_a_plain_backend_role_and_removes_unused_ones(
        fresh_dsn: str, plain_backend: str) -> None:
    # A mirror an older policy of this backend left, and one of another deployment (unlabelled).
    stale, foreign = (f"{MIRROR_PREFIX}test_{uuid.uuid4().hex[:12]}" for _ in range(2))
    with psycopg.connect(fresh_dsn, autocommit=True) as conn:
        database = conn.execute("SELECT current_database()").fetchone()[0]  # type: ignore[index]
        for name in (stale, foreign):
            conn.execute(sql.SQL("CREATE DATABASE {}").format(sql.Identifier(name)))
        conn.execute(sql.SQL("COMMENT ON DATABASE {} IS {}").format(
            sql.Identifier(stale), sql.Literal(mirror_label(database))))
    done = hushql("mirrors", "--policies", str(DEMO_POLICIES), "--backend", plain_backend,
                  "--admin", fresh_dsn)
    assert done.returncode == 0, done.stdout + done.stderr
    assert stale in done.stdout.split("mirrors removed: ")[1]
    with psycopg.connect(fresh_dsn, autocommit=True) as conn:
        assert conn.execute("SELECT count(*) FROM pg_database WHERE datname = %s",
                            [stale]).fetchone() == (0,)
        assert conn.execute("SELECT count(*) FROM pg_database WHERE datname = %s",
                            [foreign]).fetchone() == (1,)
        conn.execute(sql.SQL("DROP DATABASE {}").format(sql.Identifier(foreign)))
    # The plain role, which may create nothing, now serves catalog questions from them.
    catalog = serving_catalog(load_policies(DEMO_POLICIES), plain_backend, None)
    try:
        assert catalog.unavailable is None, catalog.unavailable
        columns, rows = catalog.run("planner", "SELECT relname FROM pg_class "
                                               "WHERE relname = 'households'")
        assert rows == [("households",)]
    finally:
        catalog.close()
