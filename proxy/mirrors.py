"""``hushql mirrors``: the catalog mirrors as an explicit administrator step, with its own DSN.

Rules of this module:
- Provisioning needs a role that may create databases and roles (``--admin DSN``, on the
  backend's server); serving then needs none of that. ``provision`` builds one mirror per grant
  set of each policy folder (``proxy.wire.catalog``), lets the backend DSN's role connect to
  them and use the unprivileged catalog role, labels them with the backend database's name, and
  removes the other mirrors labelled for that database: pass every policy folder served from
  it. Mirrors of other databases, or made before labels, are never touched.
- ``serve`` provisions by itself only when given ``--mirror-admin DSN``; otherwise it uses the
  mirrors an administrator made, and when one is missing, catalog questions are refused with a
  hint to run this command (the data answers are not affected).
"""

from __future__ import annotations

import argparse
import logging
import os
from collections.abc import Iterable

import psycopg
from psycopg import sql
from rich.console import Console

from proxy.dsn import with_database
from proxy.errors import CANNOT_CONNECT, CONFIG_FILE_ERROR, HushError
from proxy.policy import Policies
from proxy.wire.catalog import (
    MIRROR_PREFIX,
    ROLE,
    Catalog,
    build_catalog,
    mirror_layout,
    mirror_name,
)

log = logging.getLogger("hushql.mirrors")


def expected_mirrors(policies: Policies, backend_database: str) -> set[str]:
    """The mirror database names ``policies`` use on a backend database."""
    grant_sets = {tuple(sorted(set(a.tables))) for a in policies.analysts.values()}
    if policies.admins:
        grant_sets.add(())
    return {mirror_name(backend_database, mirror_layout(policies, tables))
            for tables in grant_sets}


def mirror_label(backend_database: str) -> str:
    """The comment ``provision`` puts on the mirrors it makes for a backend database; removal
    considers only mirrors carrying the label of the backend it provisions."""
    return f"hushql catalog mirror for database {backend_database}"


def provision(policy_sets: Iterable[Policies], backend_dsn: str, admin_dsn: str
              ) -> tuple[list[str], list[str]]:
    """Build the mirrors of every policy set, let the backend's role use them, and drop every
    other mirror on the server; returns (mirrors in use, mirrors removed). Raises
    RuntimeError with the reason when a mirror cannot be made."""
    with psycopg.connect(backend_dsn, autocommit=True, connect_timeout=10) as backend:
        facts = backend.execute("SELECT current_database(), current_user").fetchone()
    assert facts is not None
    database, backend_role = facts
    admin_on_backend = with_database(admin_dsn, database)
    keep: set[str] = set()
    for policies in policy_sets:
        catalog = build_catalog(policies, admin_on_backend)
        try:
            if catalog.unavailable is not None:
                raise RuntimeError(catalog.unavailable)
            keep |= set(catalog.mirrors.values())
        finally:
            catalog.close()
    removed: list[str] = []
    with psycopg.connect(admin_on_backend, autocommit=True, connect_timeout=10) as admin:
        role = sql.Identifier(backend_role)
        member = admin.execute("SELECT pg_has_role(%s, %s, 'MEMBER')",
                               [backend_role, ROLE]).fetchone()
        if not member or not member[0]:
            admin.execute(sql.SQL("GRANT {} TO {}").format(sql.Identifier(ROLE), role))
        label = mirror_label(database)
        for name in sorted(keep):
            admin.execute(sql.SQL("GRANT CONNECT ON DATABASE {} TO {}").format(
                sql.Identifier(name), role))
            admin.execute(sql.SQL("COMMENT ON DATABASE {} IS {}").format(
                sql.Identifier(name), sql.Literal(label)))
        # Only mirrors labelled for this backend database: other deployments' stay untouched.
        pattern = MIRROR_PREFIX.replace("_", r"\_") + "%"
        for (name,) in admin.execute(
                "SELECT datname FROM pg_database d WHERE datname LIKE %s "
                "AND shobj_description(d.oid, 'pg_database') = %s ORDER BY datname",
                [pattern, label]).fetchall():
            if name not in keep:
                admin.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(
                    sql.Identifier(name)))
                removed.append(name)
    return sorted(keep), removed


def serving_catalog(policies: Policies, backend_dsn: str, mirror_admin_dsn: str | None
                    ) -> Catalog:
    """The catalog ``serve`` uses: provisioned with ``mirror_admin_dsn`` when given, else the
    existing mirrors, else a catalog that refuses catalog questions with a hint."""
    if mirror_admin_dsn:
        try:
            provision([policies], backend_dsn, mirror_admin_dsn)
        except (RuntimeError, psycopg.Error) as error:
            log.warning("catalog mirrors could not be provisioned: %s", error)
    try:
        with psycopg.connect(backend_dsn, autocommit=True, connect_timeout=10) as backend:
            row = backend.execute("SELECT current_database()").fetchone()
            assert row is not None
            wanted = expected_mirrors(policies, row[0])
            found = {name for (name,) in backend.execute(
                "SELECT datname FROM pg_database WHERE datname = ANY (%s)",
                [sorted(wanted)]).fetchall()}
    except psycopg.Error as error:
        log.warning("catalog mirrors unavailable (%s)", type(error).__name__)
        found, wanted = set(), {"?"}
    if found != wanted:
        log.warning("catalog mirrors missing: %d of %d; catalog questions will be refused "
                    "until an administrator runs `hushql mirrors`", len(wanted - found),
                    len(wanted))
        return Catalog(policies, unavailable="Ask the administrator to provision the catalog "
                                             "mirrors (hushql mirrors).")
    return build_catalog(policies, backend_dsn)


def add_mirrors_command(commands: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    """Add ``mirrors`` to the ``hushql`` parser."""
    mirrors = commands.add_parser("mirrors", help="build the catalog mirrors with an "
                                  "administrator's DSN and remove unused ones")
    mirrors.add_argument("--policies", action="append", required=True,
                         help="a policy folder served from this server (repeat for each)")
    mirrors.add_argument("--backend", default=os.environ.get("HUSHQL_BACKEND"), required=False,
                         help="DSN serve uses for the data (HUSHQL_BACKEND)")
    mirrors.add_argument("--admin", required=True,
                         help="DSN of a role that may create databases and roles on the "
                              "backend's server")


def run_mirrors(args: argparse.Namespace, console: Console) -> int:
    """Provision the mirrors; print which are in use and which were removed."""
    from proxy.policy import PolicyError, load_policies

    if not args.backend:
        raise HushError(CANNOT_CONNECT, "no backend database given",
                        hint="pass --backend DSN or set HUSHQL_BACKEND")
    try:
        policy_sets = [load_policies(folder) for folder in args.policies]
    except PolicyError as error:
        raise HushError(CONFIG_FILE_ERROR, "the policy folder has problems:\n" +
                        "\n".join(error.problems)) from None
    try:
        kept, removed = provision(policy_sets, args.backend, args.admin)
    except RuntimeError as error:
        raise HushError(CONFIG_FILE_ERROR, f"the mirrors could not be made: {error}") from None
    except psycopg.Error as error:
        raise HushError(CANNOT_CONNECT, "the backend's server could not be reached or refused "
                        f"({type(error).__name__})") from None
    console.print(f"mirrors in use: {', '.join(kept) or 'none'}", highlight=False)
    console.print(f"mirrors removed: {', '.join(removed) or 'none'}", highlight=False)
    return 0
