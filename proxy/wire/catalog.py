"""Catalog questions, answered from a data-free mirror of each analyst's granted tables.

Clients ask pg_catalog and information_schema what exists (psql's \\dt and \\d, JDBC's
DatabaseMetaData, SQLAlchemy's dialect start-up and inspector, asyncpg and pg8000 start-up,
``SELECT 1`` pings). hushql answers them from PostgreSQL itself, but never from the database
that holds the data:

- **Mirrors.** For every distinct set of granted tables there is one mirror database on the
  backend's server, ``hushql_mirror_<hash>``, made from template0. It holds one empty table per
  granted table with only the policy's exposed columns, typed from the column kinds, and the
  policy descriptions as comments. The hash covers the backend database's name and the mirror's
  whole layout, so a changed policy gets a new mirror and several proxies with the same
  policies share one. A mirror is built under a temporary name and renamed when complete; at
  start an existing one is checked (layout, emptiness, nothing added) and rebuilt if it differs.
- **An unprivileged role.** Each catalog query runs in a READ ONLY transaction with a
  statement timeout, after ``SET LOCAL ROLE hushql_catalog``: a NOLOGIN role with no attributes
  and no memberships, so a function that slipped past the guard's checks would still run
  without the backend role's powers (no pg_read_file, no other sessions' query texts). The
  only way back from inside a SELECT, ``set_config('role' | 'session_authorization', ...)``,
  is closed by the guard's checks (a setting name must be one listed literal), and the
  transaction, role and all, is rolled back after every query. NOLOGIN means the role adds no
  credential anyone could use to connect to the server.

When the mirror cannot be made (the backend role may not create databases or roles), the
catalog is unavailable and catalog queries are refused with 0A000 and a hint; the reason is
logged once at start.

The text checks, the rewriting and the routing are pure and live in
proxy.wire.catalog_guard (the session's only view of the catalog).
"""

from __future__ import annotations

import hashlib
import json
import logging
import secrets
import threading
from contextlib import contextmanager
from decimal import Decimal
from dataclasses import dataclass
from typing import Any, Iterable, Iterator, Sequence

import psycopg
from psycopg import sql
from psycopg.adapt import Transformer
from psycopg.pq import DiagnosticField, ExecStatus, Format
from psycopg.types.string import TextLoader
from psycopg_pool import ConnectionPool
from sqlglot import exp

from proxy.errors import (FEATURE_NOT_SUPPORTED, INSUFFICIENT_PRIVILEGE, INTERNAL_ERROR,
                          PROGRAM_LIMIT_EXCEEDED, QUERY_CANCELED, TOO_MANY_CONNECTIONS,
                          HushError)
from proxy.dsn import with_database
from proxy.policy import ColumnPolicy, Policies
from proxy.sql.vocabulary import column_types
from proxy.wire import own_database, statements, types
from proxy.wire.askable import (column_comment, my_tables_rows, names_my_tables, table_comment,
                                with_my_tables)
from proxy.wire.catalog_guard import (CATALOG_HINT, TOO_LARGE_MARK, bounded, check_catalog_text,
                                      claims_text, is_catalog_tree, narrowed, personalise)

__all__ = ["Catalog", "build_catalog", "is_catalog_tree", "claims_text", "check_catalog_text",
           "mirror_layout", "personalise", "bounded", "ROLE"]

log = logging.getLogger("hushql.catalog")

ROLE = "hushql_catalog"
MIRROR_PREFIX = "hushql_mirror_"
# Bumped whenever the way mirrors are built changes, so old mirrors are not reused.
# 2: comments carry each column's kind, range or values, unit and step, and the table's unit.
LAYOUT_VERSION = 2
STATEMENT_TIMEOUT_MS = 3000
MAX_ROWS = 100_000
# The largest catalog answer, in bytes of PostgreSQL's text for its rows. What the supported
# clients read is far smaller: all of pg_proc is some 0.5 MB (measured on PostgreSQL 15).
MAX_BYTES = 4 * 1024 * 1024
POOL_SIZE = 4
# Catalog answers being fetched at once in the process, whatever the mirror; others wait up
# to WAIT_SECONDS for their turn.
MOST_AT_ONCE = 4
WAIT_SECONDS = 10.0


# ----------------------------------------------------------------------------- mirror layout


@dataclass(frozen=True)
class MirrorColumn:
    name: str
    type: str
    description: str | None = None


@dataclass(frozen=True)
class MirrorTable:
    name: str
    description: str
    columns: tuple[MirrorColumn, ...]


def column_type(column: ColumnPolicy) -> str:
    """The mirror's SQL type for a policy column (``proxy.sql.vocabulary.column_types``)."""
    return column_types(column).sql


def mirror_layout(policies: Policies, tables: Iterable[str]) -> tuple[MirrorTable, ...]:
    """The empty tables a mirror of these granted tables holds, sorted by name, with the
    policy as comments (psql's \\d+, JDBC's REMARKS, SQLAlchemy's inspector show them)."""
    out = []
    for name in sorted(set(tables)):
        policy = policies.tables[name]
        identifying = policy.individual.column if policy.individual is not None else None
        out.append(MirrorTable(name, table_comment(policy), tuple(
            MirrorColumn(col, column_type(c), column_comment(c, col == identifying))
            for col, c in policy.columns.items())))
    return tuple(out)


def mirror_name(backend_database: str, layout: tuple[MirrorTable, ...]) -> str:
    """``hushql_mirror_<hash>``: one name per backend database and layout."""
    body = json.dumps([LAYOUT_VERSION, backend_database,
                       [[t.name, t.description, [[c.name, c.type, c.description]
                                                 for c in t.columns]] for t in layout]])
    return MIRROR_PREFIX + hashlib.sha256(body.encode()).hexdigest()[:12]


class CatalogSetupError(Exception):
    """The mirror or its role could not be made; the catalog is then unavailable."""


_ROLE_FACTS = (
    "SELECT rolsuper OR rolcreatedb OR rolcreaterole OR rolcanlogin OR rolreplication "
    "OR rolbypassrls OR rolinherit, EXISTS (SELECT 1 FROM pg_auth_members WHERE member = r.oid), "
    "pg_has_role(current_user, r.oid, 'MEMBER') FROM pg_roles r WHERE rolname = %s")


def _ensure_role(admin: psycopg.Connection[Any]) -> None:
    """Makes ROLE a NOLOGIN role with no attributes and no memberships that the admin role
    may SET ROLE to: creates it, or repairs one that has drifted. A role an administrator
    made that way beforehand (and granted to the backend role) is used as it is, so the
    backend role then needs no CREATEROLE. Raises CatalogSetupError when it cannot be made
    safe."""
    role = sql.Identifier(ROLE)
    try:
        facts = admin.execute(_ROLE_FACTS, (ROLE,)).fetchone()
        if facts is None:
            try:
                admin.execute(sql.SQL("CREATE ROLE {} NOLOGIN NOINHERIT").format(role))
            except (psycopg.errors.DuplicateObject, psycopg.errors.UniqueViolation):
                pass  # another proxy made it at the same moment
            facts = admin.execute(_ROLE_FACTS, (ROLE,)).fetchone()
        if facts is not None and facts[0]:
            admin.execute(sql.SQL("ALTER ROLE {} NOLOGIN NOSUPERUSER NOCREATEDB NOCREATEROLE "
                                  "NOINHERIT NOREPLICATION NOBYPASSRLS").format(role))
        if facts is not None and facts[1]:
            for (group,) in admin.execute(
                    "SELECT g.rolname FROM pg_auth_members m JOIN pg_roles g ON g.oid = m.roleid "
                    "JOIN pg_roles r ON r.oid = m.member WHERE r.rolname = %s",
                    (ROLE,)).fetchall():
                admin.execute(sql.SQL("REVOKE {} FROM {}").format(sql.Identifier(group), role))
        if facts is not None and not facts[2]:
            admin.execute(sql.SQL("GRANT {} TO CURRENT_USER").format(role))
    except psycopg.errors.InsufficientPrivilege:
        raise CatalogSetupError(f"the backend role may not create or change role {ROLE}; an "
                                f"administrator can create it (NOLOGIN) and grant it to the "
                                f"backend role") from None
    facts = admin.execute(_ROLE_FACTS, (ROLE,)).fetchone()
    if facts is None or facts[0] or facts[1] or not facts[2]:
        raise CatalogSetupError(f"role {ROLE} has attributes or memberships it must not have")


def _mirror_is_sound(dsn: str, layout: tuple[MirrorTable, ...]) -> bool:
    """Whether an existing mirror holds exactly the layout, no rows, and nothing else of its
    own (no other relations, schemas, functions or extensions)."""
    try:
        with psycopg.connect(dsn, autocommit=True, connect_timeout=10) as conn:
            relations = conn.execute(
                "SELECT n.nspname, c.relname, c.relkind FROM pg_class c JOIN pg_namespace n "
                "ON n.oid = c.relnamespace WHERE n.nspname NOT IN ('pg_catalog', "
                "'information_schema') AND n.nspname NOT LIKE 'pg_toast%' "
                "AND n.nspname NOT LIKE 'pg_temp%' ORDER BY 2").fetchall()
            if relations != [("public", t.name, "r") for t in layout]:
                return False
            for t in layout:
                columns = conn.execute(
                    "SELECT attname, format_type(atttypid, atttypmod) FROM pg_attribute "
                    "WHERE attrelid = %s::regclass AND attnum > 0 AND NOT attisdropped "
                    "ORDER BY attnum", (f"public.{t.name}",)).fetchall()
                if columns != [(c.name, c.type) for c in t.columns]:
                    return False
                empty = conn.execute(sql.SQL("SELECT NOT EXISTS (SELECT FROM {})").format(
                    sql.Identifier("public", t.name))).fetchone()
                if not (empty and empty[0]):
                    return False
            extra = conn.execute(
                "SELECT (SELECT count(*) FROM pg_namespace WHERE nspname NOT IN ('pg_catalog', "
                "'information_schema', 'public') AND nspname NOT LIKE 'pg_toast%' "
                "AND nspname NOT LIKE 'pg_temp%') + (SELECT count(*) FROM pg_proc p JOIN "
                "pg_namespace n ON n.oid = p.pronamespace WHERE n.nspname NOT IN "
                "('pg_catalog', 'information_schema')) + (SELECT count(*) FROM pg_extension "
                "WHERE extname <> 'plpgsql')").fetchone()
            return bool(extra) and extra[0] == 0
    except psycopg.Error:
        return False


def _fill_mirror(dsn: str, layout: tuple[MirrorTable, ...]) -> None:
    """Creates the empty tables, comments and privileges in a new mirror database."""
    role = sql.Identifier(ROLE)
    with psycopg.connect(dsn, autocommit=False, connect_timeout=10) as conn:
        conn.execute("REVOKE ALL ON SCHEMA public FROM PUBLIC")
        conn.execute(sql.SQL("GRANT USAGE ON SCHEMA public TO {}").format(role))
        for t in layout:
            ident = sql.Identifier("public", t.name)
            conn.execute(sql.SQL("CREATE TABLE {} ({})").format(ident, sql.SQL(", ").join(
                sql.SQL("{} {}").format(sql.Identifier(c.name), sql.SQL(c.type))
                for c in t.columns)))
            if t.description:
                conn.execute(sql.SQL("COMMENT ON TABLE {} IS {}").format(
                    ident, sql.Literal(t.description)))
            for c in t.columns:
                if c.description:
                    conn.execute(sql.SQL("COMMENT ON COLUMN {} IS {}").format(
                        sql.Identifier("public", t.name, c.name), sql.Literal(c.description)))
            conn.execute(sql.SQL("GRANT SELECT ON {} TO {}").format(ident, role))
        conn.commit()


def _create_mirror(admin: psycopg.Connection[Any], admin_dsn: str, name: str,
                   layout: tuple[MirrorTable, ...]) -> None:
    """Reuses a sound mirror called ``name`` or builds it anew under a temporary name and
    renames it into place. Raises CatalogSetupError when databases cannot be created."""
    exists = admin.execute("SELECT 1 FROM pg_database WHERE datname = %s", (name,)).fetchone()
    if exists and _mirror_is_sound(with_database(admin_dsn, name), layout):
        return
    building = f"{name}_new_{secrets.token_hex(4)}"
    ident = sql.Identifier(building)
    # The C locale with libc, so no server default (an ICU locale, a non-UTF8 locale) can
    # refuse it; LOCALE_PROVIDER is PostgreSQL 15's, so older servers get the plain form.
    for options in ("LOCALE 'C' LOCALE_PROVIDER libc", "LOCALE 'C'"):
        try:
            admin.execute(sql.SQL("CREATE DATABASE {} TEMPLATE template0 ENCODING 'UTF8' "
                                  + options).format(ident))
            break
        except psycopg.errors.SyntaxError:
            continue
        except psycopg.errors.InsufficientPrivilege:
            raise CatalogSetupError("the backend role may not create databases") from None
    else:
        raise CatalogSetupError("the server would not create a UTF8 database in the C locale")
    try:
        admin.execute(sql.SQL("REVOKE ALL ON DATABASE {} FROM PUBLIC").format(ident))
        _fill_mirror(with_database(admin_dsn, building), layout)
        admin.execute(sql.SQL("ALTER DATABASE {} SET default_transaction_read_only = on"
                              ).format(ident))
        admin.execute(sql.SQL("ALTER DATABASE {} SET statement_timeout = {}").format(
            ident, sql.Literal(f"{STATEMENT_TIMEOUT_MS}ms")))
        if exists:
            admin.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(
                sql.Identifier(name)))
        try:
            admin.execute(sql.SQL("ALTER DATABASE {} RENAME TO {}").format(
                ident, sql.Identifier(name)))
            building = ""
        except psycopg.errors.DuplicateDatabase:
            pass  # another proxy finished the same mirror first; use theirs
    finally:
        if building:
            admin.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(ident))


# ----------------------------------------------------------------------------- answering

# Results come back from the mirror as PostgreSQL's text; the few types the wire front sends
# natively are decoded with psycopg's loaders, everything else (arrays, "char", regclass,
# oidvector, domains such as information_schema's sql_identifier) travels as text.
_NATIVE_OIDS = frozenset({types.BOOL, types.INT2, types.INT4, types.INT8, types.OID,
                          types.FLOAT4, types.FLOAT8, types.NUMERIC, types.TEXT, types.VARCHAR,
                          types.BPCHAR, types.NAME, types.DATE})
_AS_STRING = frozenset({types.TEXT, types.VARCHAR, types.BPCHAR, types.NAME})


# Every OID psycopg knows, and 0 (the fallback for the rest): loaded as str.
_ALL_OIDS = tuple(sorted({0} | {oid for info in psycopg.postgres.types
                                 for oid in (info.oid, info.array_oid) if oid}))
_LOADERS = Transformer()


def _column_type(oid: int) -> int | str:
    """How a mirror result column is declared to the client."""
    return oid if oid in _NATIVE_OIDS else "text"


def _decoder(oid: int) -> Any:
    if oid not in _NATIVE_OIDS or oid in _AS_STRING:
        return None
    loader = _LOADERS.get_loader(oid, Format.TEXT)
    return lambda s: loader.load(s.encode())


# SQLSTATE classes whose messages can only be about the query's own text and values: syntax
# and access (42), data (22), features (0A), transaction state (25), cardinality (21),
# statement and cursor names (26, 34) (PostgreSQL Appendix A).
_QUERY_ERROR_CLASSES = frozenset({"42", "22", "0A", "25", "21", "26", "34"})


class Catalog:
    """Routes and answers catalog questions from the mirrors; thread-safe.

    ``mirrors`` maps each account to its mirror database (analysts by their grants,
    administrators to the mirror of no tables). With ``unavailable`` set, every catalog
    question is refused with 0A000 and that reason's hint.
    """

    def __init__(self, policies: Policies, *, admin_dsn: str = "",
                 mirrors: dict[str, str] | None = None, unavailable: str | None = None,
                 timeout_ms: int = STATEMENT_TIMEOUT_MS, max_rows: int = MAX_ROWS,
                 max_bytes: int = MAX_BYTES, database: str = "") -> None:
        self.policies = policies
        self.database = database  # the one name pg_database shows (proxy.wire.own_database)
        self._database_columns: list[str] | None = None
        self.admin_dsn = admin_dsn
        self.mirrors = dict(mirrors or {})
        self.unavailable = unavailable
        self.timeout_ms = timeout_ms
        self.max_rows = max_rows
        self.max_bytes = max_bytes
        self._at_once = threading.BoundedSemaphore(MOST_AT_ONCE)
        self._policy_tables = frozenset(policies.tables)
        self._pools: dict[str, ConnectionPool] = {}
        self._lock = threading.Lock()

    # ---- routing (called by the session) ------------------------------------------------

    def is_catalog_query(self, tree: exp.Expression) -> bool:
        return is_catalog_tree(tree, self._policy_tables)

    def is_catalog_text(self, text: str) -> bool:
        return claims_text(text, self._policy_tables)

    # ---- answering -----------------------------------------------------------------------

    def run(self, analyst: str, sql_text: str, params: Sequence[Any] = (),
            remaining: Decimal | None = None
            ) -> tuple[list[tuple[str, int | str]], list[tuple[Any, ...]]]:
        """Runs one checked catalog SELECT in the analyst's mirror: (columns, rows);
        ``remaining`` is the analyst's budget left, for ``hushql.my_tables``. Raises
        HushError (42501 refused, 54000 too many rows or bytes, 53300 too many at once, 57014
        timeout, or the mirror's own error about the query)."""
        if not self._at_once.acquire(timeout=WAIT_SECONDS):
            raise HushError(TOO_MANY_CONNECTIONS, "too many catalog questions at once",
                            hint="Try again in a moment.")
        try:
            with self._transaction(analyst, sql_text, params) as conn:
                # A server-side cursor: one statement only, and at most max_rows + 1 fetched.
                with psycopg.RawServerCursor(conn, "hushql_catalog_answer") as cur:
                    cur.execute(bounded(self._runnable(conn, personalise(sql_text, analyst),
                                                       analyst, remaining), self.max_bytes),
                                list(params))
                    described = list(cur.description or [])[:-1]
                    rows = [row[:-1] for row in cur.fetchmany(self.max_rows + 1)]
        finally:
            self._at_once.release()
        if len(rows) > self.max_rows:
            raise HushError(PROGRAM_LIMIT_EXCEEDED, "the catalog answer has more than "
                            f"{self.max_rows} rows", hint="Narrow the catalog query.")
        decoders = [_decoder(c.type_code) for c in described]
        values = [tuple(v if v is None or d is None else d(v) for v, d in zip(row, decoders))
                  for row in rows]
        return [(c.name, _column_type(c.type_code)) for c in described], values

    def describe(self, analyst: str, sql_text: str) -> list[tuple[str, int | str]]:
        """The columns a catalog SELECT would return, from the mirror's planner; runs
        nothing. Raises HushError like ``run``."""
        result = self._prepared(analyst, sql_text)
        return [(result.fname(i).decode(), _column_type(result.ftype(i)))
                for i in range(result.nfields)]

    def parameter_types(self, analyst: str, sql_text: str) -> list[int]:
        """The type OID of each $n as the mirror infers it (0 where it cannot tell); runs
        nothing. [] for a text without parameters. Raises HushError like ``run``."""
        if not any(t.kind == "param" for t in statements.tokenize(sql_text)):
            return []
        result = self._prepared(analyst, sql_text)
        return [result.param_type(i) for i in range(result.nparams)]

    def _prepared(self, analyst: str, sql_text: str) -> Any:
        """The mirror's description (a libpq result) of the checked text, prepared unnamed in
        the catalog transaction; raises HushError with the mirror's refusal."""
        with self._transaction(analyst, sql_text) as conn:
            result = conn.pgconn.prepare(
                b"", self._runnable(conn, personalise(sql_text, analyst), analyst).encode())
            if result.status == ExecStatus.COMMAND_OK:
                result = conn.pgconn.describe_prepared(b"")
        if result.status != ExecStatus.COMMAND_OK:
            def field(code: DiagnosticField) -> str | None:
                value = result.error_field(code)
                return value.decode(errors="replace") if value else None
            raise self._error(field(DiagnosticField.SQLSTATE),
                              field(DiagnosticField.MESSAGE_PRIMARY),
                              field(DiagnosticField.MESSAGE_HINT))
        return result

    def _runnable(self, conn: psycopg.Connection[Any], sql_text: str, analyst: str,
                  remaining: Decimal | None = None) -> str:
        """The checked text as the mirror runs it: pg_database narrowed to one row, the
        guard's other narrowed relations to theirs, hushql.my_tables as the analyst's rows."""
        sql_text = narrowed(sql_text)
        if names_my_tables(sql_text):
            sql_text = with_my_tables(sql_text, my_tables_rows(self.policies, analyst, remaining))
        if not own_database.names_pg_database(sql_text):
            return sql_text
        if self._database_columns is None:
            self._database_columns = [row[0] for row in conn.execute(own_database.COLUMNS_QUERY)]
        subquery = own_database.own_database_subquery(self._database_columns, self.database)
        return own_database.replace_pg_database(sql_text, subquery)

    @contextmanager
    def _transaction(self, analyst: str, sql_text: str, params: Sequence[Any] | None = None
                     ) -> Iterator[psycopg.Connection[Any]]:
        """A mirror connection inside the catalog transaction: READ ONLY, the statement and
        lock timeouts, the unprivileged role; rolled back afterwards, whatever happens. The
        text is checked first; mirror errors become HushErrors."""
        try:
            with self._pool_for(analyst, sql_text, params).connection() as conn:
                try:
                    conn.execute(sql.SQL(
                        "SET LOCAL statement_timeout = {}; SET LOCAL lock_timeout = {}; "
                        "SET LOCAL ROLE {}").format(sql.Literal(f"{self.timeout_ms}ms"),
                                                    sql.Literal(f"{self.timeout_ms}ms"),
                                                    sql.Identifier(ROLE)))
                    yield conn
                finally:
                    _end(conn)
        except psycopg.Error as error:  # includes the pool's timeouts
            raise self._error(error.sqlstate, error.diag.message_primary,
                              error.diag.message_hint) from None

    def _error(self, state: str | None, message: str | None, hint: str | None) -> HushError:
        """A mirror error for the client: its SQLSTATE and message where they can only be
        about the query itself (syntax, names, privileges, bad input), else a generic line.
        No row of data can be in them: the mirror has none."""
        state = state or INTERNAL_ERROR
        if TOO_LARGE_MARK in (message or ""):
            return HushError(PROGRAM_LIMIT_EXCEEDED, f"the catalog answer is larger than "
                             f"{self.max_bytes} bytes", hint="Narrow the catalog query.")
        if state == QUERY_CANCELED:
            return HushError(QUERY_CANCELED, "canceling statement due to statement timeout",
                             hint=f"Catalog questions must finish within {self.timeout_ms} ms.")
        if state[:2] in _QUERY_ERROR_CLASSES:
            return HushError(state, message or "the catalog query failed", hint=hint)
        return HushError(state if state[:2] == "53" else INTERNAL_ERROR,
                         "the catalog query failed", hint=CATALOG_HINT)

    def _pool_for(self, analyst: str, sql_text: str, params: Sequence[Any] | None = None
                  ) -> ConnectionPool:
        """The mirror pool for this analyst, once the text has passed the checks (with the
        parameter values it runs with; None: it is only prepared)."""
        if self.unavailable is not None:
            raise HushError(FEATURE_NOT_SUPPORTED, "catalog queries are not available on this "
                            "server", hint=self.unavailable)
        try:
            check_catalog_text(sql_text, params)
        except HushError as err:
            # By SQLSTATE only: the message can quote a literal of the query.
            log.info("catalog refused analyst=%s sqlstate=%s", analyst[:64], err.sqlstate)
            raise
        database = self.mirrors.get(analyst)
        if database is None:
            raise HushError(INSUFFICIENT_PRIVILEGE, f'no catalog for account "{analyst}"')
        with self._lock:
            pool = self._pools.get(database)
            if pool is None:
                # check: a mirror rebuilt by another proxy drops its connections.
                pool = ConnectionPool(with_database(self.admin_dsn, database), min_size=1,
                                      max_size=POOL_SIZE, open=False, configure=_configure,
                                      check=ConnectionPool.check_connection,
                                      name=f"hushql-catalog-{database[-12:]}")
                try:
                    pool.open(wait=True, timeout=10)
                except psycopg.Error:
                    pool.close()
                    raise
                self._pools[database] = pool
        return pool

    # ---- lifetime ------------------------------------------------------------------------

    def close(self) -> None:
        """Closes the mirror pools (the mirrors stay for the next start)."""
        with self._lock:
            pools, self._pools = list(self._pools.values()), {}
        for pool in pools:
            pool.close()

    def drop_mirrors(self) -> None:
        """Closes the pools and drops this catalog's mirror databases (tests, uninstall)."""
        self.close()
        if not self.admin_dsn:
            return
        with psycopg.connect(self.admin_dsn, autocommit=True) as admin:
            for database in sorted(set(self.mirrors.values())):
                admin.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(
                    sql.Identifier(database)))


def _end(conn: psycopg.Connection[Any]) -> None:
    """Rolls the catalog query's transaction back (settings and role with it). A broken
    connection is left for the pool to discard."""
    try:
        conn.rollback()
    except psycopg.Error:
        pass


def _configure(conn: psycopg.Connection[Any]) -> None:
    """Each mirror connection: read-only transactions, PostgreSQL's text for every result
    value, ISO date style (so psycopg's loaders read the few native types back)."""
    conn.autocommit = True
    # standard_conforming_strings on: the text checks read strings as the server will.
    conn.execute("SET standard_conforming_strings = on; SET datestyle = 'ISO, MDY'; "
                 "SET intervalstyle = 'postgres'; SET extra_float_digits = 3; "
                 "SET bytea_output = 'hex'")
    conn.autocommit = False
    conn.read_only = True
    conn.prepare_threshold = None  # nothing of one query outlives its transaction
    for oid in _ALL_OIDS:
        conn.adapters.register_loader(oid, TextLoader)


def build_catalog(policies: Policies, backend_dsn: str) -> Catalog:
    """The catalog for these policies: builds or reuses one mirror per distinct grant set on
    the backend's server, and the unprivileged role. Never raises for a server that will not
    allow it: the catalog is then unavailable (logged) and refuses catalog queries."""
    try:
        with psycopg.connect(backend_dsn, autocommit=True, connect_timeout=10) as admin:
            database = admin.execute("SELECT current_database()").fetchone()[0]  # type: ignore[index]
            _ensure_role(admin)
            grants: dict[str, tuple[str, ...]] = {
                name: tuple(sorted(set(a.tables))) for name, a in policies.analysts.items()}
            grants.update({name: () for name in policies.admins})
            names: dict[tuple[str, ...], str] = {}
            for tables in sorted(set(grants.values())):
                layout = mirror_layout(policies, tables)
                names[tables] = mirror_name(database, layout)
                _create_mirror(admin, backend_dsn, names[tables], layout)
    except CatalogSetupError as err:
        log.warning("catalog mirror unavailable: %s; catalog queries will be refused", err)
        return Catalog(policies, unavailable=f"Ask the administrator: {err}.")
    except psycopg.Error as err:
        log.warning("catalog mirror unavailable (%s); catalog queries will be refused",
                    type(err).__name__)
        return Catalog(policies, unavailable="Ask the administrator to check the catalog "
                                             "mirror (see the server log).")
    log.info("catalog mirrors ready: %d for %d accounts", len(names), len(grants))
    return Catalog(policies, admin_dsn=backend_dsn, database=database,
                   mirrors={account: names[tables] for account, tables in grants.items()})
