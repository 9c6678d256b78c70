"""The ledger's relations for administrators, through the proxy: ``hushql.budgets``,
``hushql.charges``, ``hushql.grants`` and ``hushql.populations``, read exactly.

Rules of this module:
- The ledger holds no private data (who spent how much epsilon when), so administrators read it
  exactly; analysts get 42501 for any relation of schema ``hushql``. Administrators still get
  no answers from the protected tables unless they are also analysts (the engine refuses them).
- A query is claimed here when it names schema ``hushql``. For an administrator it must be one
  SELECT whose every relation is one of the four (or a CTE of its own); anything else is 42501.
- It runs on the ledger database in a READ ONLY transaction with a statement timeout, as the
  NOLOGIN role ``hushql_ledger_reader``, which may select the four relations and nothing else:
  a function call cannot read files or other tables, and nothing can be written.
- Other queries go to the wrapped catalog (or are not claimed), unchanged.
"""

from __future__ import annotations

import logging
import re
import threading
from collections.abc import Sequence
from decimal import Decimal
from typing import Any

import psycopg
import sqlglot
import sqlglot.expressions as exp
from psycopg import sql
from psycopg.types.string import TextLoader

from proxy.errors import (
    FEATURE_NOT_SUPPORTED,
    INSUFFICIENT_PRIVILEGE,
    INTERNAL_ERROR,
    PROGRAM_LIMIT_EXCEEDED,
    HushError,
)
from proxy.policy import Policies
from proxy.wire import askable
from proxy.wire.boundary import CatalogQuestions
from proxy.wire.catalog import (
    _ALL_OIDS,
    MAX_ROWS,
    STATEMENT_TIMEOUT_MS,
    _column_type,
    _decoder,
)

log = logging.getLogger("hushql.ledger_relations")

SCHEMA = "hushql"
RELATIONS = frozenset({"budgets", "charges", "grants", "populations"})
READER_ROLE = "hushql_ledger_reader"

# "hushql." and the name after it ("" when none follows, which counts as a ledger relation).
_NAMES_SCHEMA = re.compile(r'(?i)(?<![\w$])"?hushql"?\s*\.\s*"?([\w$]*)')
# Errors about the query's own text (syntax, access, data, features, cardinality, writing in a
# read-only transaction): the ledger
# holds nothing private, so an administrator may see them (PostgreSQL Appendix A classes).
_QUERY_ERROR_CLASSES = frozenset({"42", "22", "0A", "21", "25"})


def names_ledger_schema(tree: exp.Expression | None, text: str) -> bool:
    """Whether a statement refers to a ledger relation of schema hushql (from its tree, else
    from its text); ``hushql.my_tables``, every account's own, is the catalog's
    (proxy.wire.askable)."""
    if tree is not None:
        return any(t.db.lower() == SCHEMA and t.name.lower() != askable.RELATION
                   for t in tree.find_all(exp.Table))
    return any(found.group(1).lower() != askable.RELATION
               for found in _NAMES_SCHEMA.finditer(text))


def _only_ledger_relations(text: str) -> bool:
    """One SELECT whose relations are all hushql.{budgets, charges, grants, populations} or its
    own CTEs; False on anything else, including text sqlglot cannot parse."""
    try:
        trees = sqlglot.parse(text, read="postgres")
    except sqlglot.errors.ParseError:
        return False
    if len(trees) != 1 or not isinstance(trees[0], (exp.Select, exp.SetOperation)):
        return False
    tree = trees[0]
    ctes = {cte.alias_or_name.lower() for cte in tree.find_all(exp.CTE)}
    for table in tree.find_all(exp.Table):
        if isinstance(table.this, exp.Func) or table.catalog:
            return False
        schema, name = table.db.lower(), table.name.lower()
        if not ((schema == SCHEMA and name in RELATIONS) or (not schema and name in ctes)):
            return False
    return True


class LedgerRelations:
    """Answers administrators' queries on the ledger's relations; delegates the rest to
    ``inner`` (the catalog, or None). Thread-safe: one short connection per query."""

    def __init__(self, policies: Policies, ledger_dsn: str,
                 inner: CatalogQuestions | None = None, *,
                 timeout_ms: int = STATEMENT_TIMEOUT_MS, max_rows: int = MAX_ROWS) -> None:
        self._admins = frozenset(policies.admins)
        self._dsn = ledger_dsn
        self.inner = inner
        self._timeout_ms = timeout_ms
        self._max_rows = max_rows
        self._lock = threading.Lock()
        self.unavailable: str | None = None
        try:
            self._provision()
        except psycopg.Error as error:
            self.unavailable = (f"the ledger role {READER_ROLE} could not be prepared "
                                f"({type(error).__name__})")
            log.warning("administrators' ledger relations unavailable: %s", self.unavailable)

    def _provision(self) -> None:
        """Create the reader role if missing (NOLOGIN, no attributes) and let it select the
        four relations; the ledger DSN's role must be able to SET ROLE to it."""
        role = sql.Identifier(READER_ROLE)
        with psycopg.connect(self._dsn, autocommit=True, connect_timeout=10) as conn:
            exists = conn.execute("SELECT 1 FROM pg_roles WHERE rolname = %s",
                                  [READER_ROLE]).fetchone()
            if exists is None:
                try:
                    conn.execute(sql.SQL("CREATE ROLE {} NOLOGIN NOINHERIT").format(role))
                except (psycopg.errors.DuplicateObject, psycopg.errors.UniqueViolation):
                    pass  # another proxy made it at the same moment
            member = conn.execute("SELECT pg_has_role(current_user, %s, 'MEMBER')",
                                  [READER_ROLE]).fetchone()
            if not member or not member[0]:
                conn.execute(sql.SQL("GRANT {} TO CURRENT_USER").format(role))
            conn.execute(sql.SQL("GRANT USAGE ON SCHEMA {} TO {}").format(
                sql.Identifier(SCHEMA), role))
            conn.execute(sql.SQL("GRANT SELECT ON {} TO {}").format(
                sql.SQL(", ").join(sql.Identifier(SCHEMA, r) for r in sorted(RELATIONS)), role))

    def replace(self, policies: Policies, inner: CatalogQuestions | None
                ) -> CatalogQuestions | None:
        """Serve ``policies``' administrators and delegate to ``inner`` from now on; returns
        the catalog replaced (for the caller to close)."""
        old, self.inner = self.inner, inner
        self._admins = frozenset(policies.admins)
        return old

    # ---- routing (called by the session) ------------------------------------------------

    def is_catalog_query(self, tree: exp.Expression) -> bool:
        if names_ledger_schema(tree, ""):
            return True
        return self.inner is not None and bool(self.inner.is_catalog_query(tree))

    def is_catalog_text(self, text: str) -> bool:
        if names_ledger_schema(None, text):
            return True
        return self.inner is not None and bool(self.inner.is_catalog_text(text))

    # ---- answering -----------------------------------------------------------------------

    def run(self, user: str, sql_text: str, params: Sequence[Any] = (),
            remaining: Decimal | None = None
            ) -> tuple[list[tuple[str, int | str]], list[tuple[Any, ...]]]:
        """(columns, rows) of one query; HushError 42501 when ``user`` may not read the ledger
        relations or the query reaches beyond them. Other queries go to the catalog (with
        ``remaining``, for hushql.my_tables)."""
        if not names_ledger_schema(None, sql_text):
            return self._inner().run(user, sql_text, params, remaining)
        self._check(user, sql_text)
        return self._query(sql_text, params, describe_only=False)

    def describe(self, user: str, sql_text: str) -> list[tuple[str, int | str]]:
        if not names_ledger_schema(None, sql_text):
            return self._inner().describe(user, sql_text)
        self._check(user, sql_text)
        return self._query(sql_text, (), describe_only=True)[0]

    def parameter_types(self, user: str, sql_text: str) -> list[int]:
        if not names_ledger_schema(None, sql_text):
            return self.inner.parameter_types(user, sql_text) if self.inner is not None else []
        self._check(user, sql_text)
        return []

    def close(self) -> None:
        if self.inner is not None:
            self.inner.close()

    def _inner(self) -> CatalogQuestions:
        if self.inner is None:
            raise HushError(FEATURE_NOT_SUPPORTED, "catalog queries are not available on this "
                            "server")
        return self.inner

    def _check(self, user: str, sql_text: str) -> None:
        if user not in self._admins:
            raise HushError(INSUFFICIENT_PRIVILEGE, f"permission denied for schema {SCHEMA}",
                            hint="the privacy ledger's relations are for administrators")
        if not _only_ledger_relations(sql_text):
            raise HushError(INSUFFICIENT_PRIVILEGE, "administrators may read only "
                            "hushql.budgets, hushql.charges, hushql.grants and "
                            "hushql.populations, one SELECT at a time",
                            hint="SELECT ... FROM hushql.charges WHERE ...")
        if self.unavailable is not None:
            raise HushError(FEATURE_NOT_SUPPORTED, "the ledger's relations are not available "
                            "on this server", hint=self.unavailable)

    def _query(self, sql_text: str, params: Sequence[Any], *, describe_only: bool
               ) -> tuple[list[tuple[str, int | str]], list[tuple[Any, ...]]]:
        try:
            with psycopg.connect(self._dsn, connect_timeout=10,
                                 application_name="hushql-ledger-relations") as conn:
                # PostgreSQL's text for every value, read back like the catalog's answers.
                for oid in _ALL_OIDS:
                    conn.adapters.register_loader(oid, TextLoader)
                with conn.transaction():
                    conn.execute("SET LOCAL datestyle = 'ISO, MDY'")
                    conn.execute("SET LOCAL extra_float_digits = 3")
                    conn.execute("SET TRANSACTION READ ONLY")
                    conn.execute(f"SET LOCAL statement_timeout = {int(self._timeout_ms)}")
                    conn.execute(sql.SQL("SET LOCAL ROLE {}").format(
                        sql.Identifier(READER_ROLE)))
                    with psycopg.RawServerCursor(conn, "hushql_ledger_answer") as cur:
                        cur.execute(sql_text, list(params))
                        described = list(cur.description or [])
                        rows = [] if describe_only else cur.fetchmany(self._max_rows + 1)
        except psycopg.Error as error:
            state = error.sqlstate or ""
            if state[:2] in _QUERY_ERROR_CLASSES and error.diag.message_primary:
                raise HushError(state, error.diag.message_primary) from None
            log.error("ledger relations query failed: %s", type(error).__name__)
            raise HushError(INTERNAL_ERROR, "the ledger could not answer") from None
        if len(rows) > self._max_rows:
            raise HushError(PROGRAM_LIMIT_EXCEEDED,
                            f"the answer has more than {self._max_rows} rows",
                            hint="narrow the query")
        decoders = [_decoder(c.type_code) for c in described]
        values = [tuple(v if v is None or d is None else d(v) for v, d in zip(row, decoders))
                  for row in rows]
        return [(c.name, _column_type(c.type_code)) for c in described], values
