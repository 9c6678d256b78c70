"""Shared fixtures: a PostgreSQL server for the whole run, and a fresh database per test.

The server is found in this order: ``HUSHQL_TEST_DSN``; else a PostgreSQL
container when a Docker engine answers; else a private server started from binaries on PATH or
the pgserver wheel (``proxy.localpg``). Every database a test gets is created for it and dropped
afterwards, so runs never see each other's data.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import uuid
from collections.abc import Iterator
from pathlib import Path

import psycopg
import pytest
from psycopg.conninfo import conninfo_to_dict

from proxy.dsn import with_database
from proxy.mirrors import mirror_label
from proxy.wire.catalog import MIRROR_PREFIX


def _docker_answers() -> bool:
    if shutil.which("docker") is None:
        return False
    try:
        import docker  # type: ignore[import-untyped]

        docker.from_env(timeout=3).ping()
        return True
    except Exception:  # any failure means "no engine here"
        return False


@pytest.fixture(scope="session")
def pg_server_dsn() -> Iterator[str]:
    """An admin DSN (superuser, database postgres or the one given) for the run's server."""
    given = os.environ.get("HUSHQL_TEST_DSN")
    if given:
        yield given
        return
    if _docker_answers():
        from testcontainers.postgres import PostgresContainer

        with PostgresContainer("postgres:16-alpine", driver=None) as container:
            yield container.get_connection_url()
        return
    from proxy.localpg import start_local_postgres

    folder = Path(tempfile.mkdtemp(prefix="hushql-test-pg-"))
    server = start_local_postgres(folder)
    try:
        yield server.dsn
    finally:
        server.stop()
        shutil.rmtree(folder, ignore_errors=True)


def create_database(admin_dsn: str) -> str:
    """Create a uniquely named empty database; returns its DSN."""
    name = f"hushql_test_{uuid.uuid4().hex[:12]}"
    with psycopg.connect(admin_dsn, autocommit=True) as conn:
        conn.execute(f'CREATE DATABASE "{name}"')
    return with_database(admin_dsn, name)


def drop_database(admin_dsn: str, dsn: str) -> None:
    """Drop a database made by create_database, ending any session still connected to it,
    and the catalog mirrors labelled for it (``proxy.mirrors.provision`` labels the mirrors it
    makes, the demo's among them; a test that stops a demo leaves them, and they would
    outlive the run)."""
    name = conninfo_to_dict(dsn)["dbname"]
    with psycopg.connect(admin_dsn, autocommit=True) as conn:
        conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
        for (mirror,) in conn.execute(
                "SELECT datname FROM pg_database d WHERE datname LIKE %s "
                "AND shobj_description(d.oid, 'pg_database') = %s",
                [MIRROR_PREFIX.replace("_", r"\_") + "%", mirror_label(name)]).fetchall():
            conn.execute(f'DROP DATABASE IF EXISTS "{mirror}" WITH (FORCE)')


@pytest.fixture
def fresh_dsn(pg_server_dsn: str) -> Iterator[str]:
    """DSN of a brand-new database of this test's own, dropped afterwards."""
    dsn = create_database(pg_server_dsn)
    try:
        yield dsn
    finally:
        drop_database(pg_server_dsn, dsn)


@pytest.fixture(scope="module")
def module_dsn(pg_server_dsn: str) -> Iterator[str]:
    """Like fresh_dsn, shared by the tests of one module (for data that is slow to load)."""
    dsn = create_database(pg_server_dsn)
    try:
        yield dsn
    finally:
        drop_database(pg_server_dsn, dsn)
