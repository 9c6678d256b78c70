"""Apache Spark as the backend, through Spark Connect (``sc://HOST:PORT``).

Rules of this module:
- The rewrite (``proxy.sql.rewrite``) stays one sqlglot tree, written for PostgreSQL. This module
  reads that text back (``read="postgres"``), applies the transforms of ``SPARK_TRANSFORMS`` (one
  row per place where the engines differ and sqlglot's Spark writer does not already agree), and
  writes it with ``dialect="spark"``. The privacy argument of the rewrite's docstring is kept
  because every transform produces the same values on every row (see each row's reason).
- Where sqlglot's writer already bridges a difference, tests pin it (``tests/test_spark.py``):
  NULL ordering (PostgreSQL sorts NULL last ascending, Spark first: the writer adds NULLS LAST),
  ``date_trunc`` (Spark's takes the unit first, as PostgreSQL's, and returns a timestamp that the
  rewrite casts to a date), casts to text (STRING), and integer division (Spark's ``/`` is always
  exact; the rewrite only divides number columns by their step, never two integers).
- Session settings the rewrite reads with ``current_setting(name)`` (the per-query salt of the
  random choice of cells) become named parameters of Spark's parameterised SQL, bound per query:
  a setting the engine did not give fails the query (fail closed).
- Spark runs with ANSI mode on: an overflowing sum or a decimal that no longer fits raises an
  error instead of becoming NULL (which COALESCE would turn into a data-dependent 0).
- Statement timeouts and cancellation use Spark Connect's operation tags: each query runs under
  a tag of its own, interrupted by a timer or by the session's cancel request.
- Spark error text never leaves this module (it could quote a row), as in ``proxy.backend``.
  Spark has no read-only transactions: give the Connect server's user read access only.
"""

from __future__ import annotations

import functools
import logging
import threading
import uuid
from collections.abc import Callable
from typing import Any

import sqlglot
import sqlglot.expressions as exp

from proxy.backend import QueryControl
from proxy.errors import INTERNAL_ERROR, QUERY_CANCELED, HushError
from proxy.policy import Policies

log = logging.getLogger("hushql.spark")

SPARK_SCHEME = "sc://"

# Spark session settings the backend fixes for every query (see the module rules).
SESSION_CONFIG = {
    "spark.sql.ansi.enabled": "true",
    # Query text and tags are per session: keep the session's time zone fixed so that date
    # buckets never depend on the server's locale (common practice).
    "spark.sql.session.timeZone": "UTC",
}


def is_spark_dsn(dsn: str | None) -> bool:
    """Whether a backend DSN names a Spark Connect server rather than PostgreSQL."""
    return bool(dsn) and dsn.startswith(SPARK_SCHEME)  # type: ignore[union-attr]


def parameter_name(setting: str) -> str:
    """The Spark SQL parameter standing for a PostgreSQL session setting (dots are not allowed
    in parameter names): ``hushql.pick_salt`` -> ``hushql_pick_salt``."""
    return setting.replace(".", "_")


# ---- the transforms: PostgreSQL tree -> Spark tree ---------------------------------------------

def _settings_as_parameters(tree: exp.Expression) -> exp.Expression:
    """``current_setting('x.y')`` -> the named parameter ``:x_y``, bound per query."""
    def replace(node: exp.Expression) -> exp.Expression:
        if isinstance(node, exp.Anonymous) and str(node.this).lower() == "current_setting":
            (name,) = node.expressions
            return exp.Placeholder(this=parameter_name(name.name))
        return node
    return tree.transform(replace, copy=False)


def _number_series(tree: exp.Expression) -> exp.Expression:
    """``generate_series(lo, hi) AS s(v)`` in FROM -> ``range(lo, hi + 1) AS s(v)``: the same
    integers lo..hi, one row each (Spark's range excludes its end)."""
    for table in list(tree.find_all(exp.Table)):
        series = table.this
        if isinstance(series, (exp.GenerateSeries, exp.ExplodingGenerateSeries)):
            end = exp.Add(this=series.args["end"].copy(), expression=exp.Literal.number(1))
            table.set("this", exp.Anonymous(this="range",
                                            expressions=[series.args["start"].copy(), end]))
    return tree


# name -> (transform, why it keeps the rewrite's values). Applied in this order.
SPARK_TRANSFORMS: dict[str, tuple[Callable[[exp.Expression], exp.Expression], str]] = {
    "settings as parameters": (
        _settings_as_parameters,
        "Spark Connect has no per-session custom settings the SQL can read; the value is bound "
        "as a parameter of the same query instead, so it is still fresh per query"),
    "number series": (
        _number_series,
        "Spark has no generate_series table function; range(lo, hi + 1) lists the same "
        "integers lo..hi, the declared domain of an integer key"),
}


@functools.lru_cache(maxsize=1024)
def to_spark_sql(postgres_sql: str) -> str:
    """The rewrite's PostgreSQL query written for Spark SQL (pure; cached by text)."""
    tree = sqlglot.parse_one(postgres_sql, read="postgres")
    for transform, _why in SPARK_TRANSFORMS.values():
        tree = transform(tree)
    return tree.sql(dialect="spark")


# ---- types -----------------------------------------------------------------------------------

# Spark type name (simpleString, without parameters) -> the PostgreSQL type the engine expects.
# Only "numeric" changes the rewrite (exact sums); the others are named for operators.
SPARK_TO_POSTGRES_TYPES = {
    "decimal": "numeric",
    "tinyint": "smallint",
    "smallint": "smallint",
    "int": "integer",
    "bigint": "bigint",
    "float": "real",
    "double": "double precision",
    "string": "text",
    "boolean": "boolean",
    "date": "date",
    "timestamp": "timestamp with time zone",
    "timestamp_ntz": "timestamp without time zone",
}


def postgres_type_name(spark_type: str) -> str:
    """A Spark column type as the PostgreSQL name the engine reads (``decimal(10,2)`` ->
    ``numeric(10,2)``); unknown types keep their Spark name, so they are never exact."""
    base, _, parameters = spark_type.partition("(")
    name = SPARK_TO_POSTGRES_TYPES.get(base, spark_type)
    return f"{name}({parameters}" if parameters and name != spark_type else name


# ---- the backend -----------------------------------------------------------------------------

class _TagCanceller:
    """What QueryControl cancels for a Spark query: the operations under one tag."""

    def __init__(self, session: Any, tag: str) -> None:
        self._session = session
        self._tag = tag

    def cancel_safe(self, timeout: float | None = None) -> None:
        self._session.interruptTag(self._tag)


class SparkBackend:
    """Runs rewritten queries on a Spark Connect server; the same contract as proxy.backend's
    Backend (``run``, ``column_types``, ``close``)."""

    def __init__(self, dsn: str, *, statement_timeout_ms: int = 300_000) -> None:
        from pyspark.sql import SparkSession

        self.dsn = dsn
        self._timeout = statement_timeout_ms / 1000
        self._session = SparkSession.builder.remote(dsn).create()
        for key, value in SESSION_CONFIG.items():
            self._session.conf.set(key, value)

    def run(self, sql: str, control: QueryControl | None = None,
            settings: dict[str, str] | None = None) -> list[tuple[Any, ...]]:
        """Run one rewritten (PostgreSQL) query on Spark and return all its rows as tuples.

        ``settings`` bind the settings the query reads (the per-query salt). Raises HushError
        57014 when cancelled or timed out, XX000 on any other failure (no Spark text).
        """
        tag = f"hushql-{uuid.uuid4().hex}"
        timed_out = threading.Event()

        def expire() -> None:
            timed_out.set()
            self._session.interruptTag(tag)

        timer = threading.Timer(self._timeout, expire)
        try:
            text = to_spark_sql(sql)
            arguments = {parameter_name(k): v for k, v in (settings or {}).items()}
            if control is not None and not control._attach(_TagCanceller(self._session, tag)):
                raise HushError(QUERY_CANCELED, "canceling statement due to user request")
            self._session.addTag(tag)  # thread-local: only this thread's operations
            timer.start()
            try:
                rows = self._session.sql(text, args=arguments or None).collect()
            finally:
                timer.cancel()
                self._session.removeTag(tag)
                if control is not None:
                    control._attach(None)
            return [tuple(row) for row in rows]
        except HushError:
            raise
        except Exception as error:
            if control is not None and control.cancelled:
                raise HushError(QUERY_CANCELED, "canceling statement due to user request") from None
            if timed_out.is_set():
                log.warning("spark query timed out: %s", type(error).__name__)
                raise HushError(QUERY_CANCELED, "canceling statement due to statement timeout",
                                hint="the query took longer than the proxy allows") from None
            # Logged for the operator by class only; the text might quote a row value.
            log.error("spark query failed: %s", type(error).__name__)
            raise HushError(INTERNAL_ERROR, "the backend could not run the query",
                            hint="ask an administrator to check the table's policy and source") from None

    def column_types(self, relation: str) -> dict[str, str]:
        """Column name -> PostgreSQL type name of a Spark table (``db.table``)."""
        schema = self._session.table(relation).schema
        return {field.name: postgres_type_name(field.dataType.simpleString()) for field in schema}

    def close(self) -> None:
        try:
            self._session.stop()
        except Exception:  # the server may already be gone; nothing left to release
            log.debug("spark session stop failed", exc_info=True)



# PostgreSQL type name (as postgres_type_name gives it) -> PostgreSQL's type category letter,
# so that serving checks each column's kind against Spark's type as it does for PostgreSQL.
_TYPE_CATEGORIES = {"numeric": "N", "smallint": "N", "integer": "N", "bigint": "N", "real": "N",
                    "double precision": "N", "text": "S", "boolean": "B", "date": "D",
                    "timestamp with time zone": "D", "timestamp without time zone": "D"}


def source_problems(policies: Policies, dsn: str) -> list[str]:
    """Every table, column and type of ``policies`` the Spark server cannot answer, one line
    each (as ``proxy.safe_config.backend_problems`` does for PostgreSQL). Raises when the
    server cannot be reached."""
    from proxy.safe_config import KIND_TYPE_CATEGORIES

    problems: list[str] = []
    backend = SparkBackend(dsn)
    try:
        for name, table in sorted(policies.tables.items()):
            label = f"tables/{name}.toml"
            try:
                found = backend.column_types(table.source)
            except Exception:  # the analysis error names the table, never a row
                problems.append(f"{label}: source: {table.source} is not a table the Spark "
                                "server's user can read")
                continue
            if table.individual is not None and table.individual.column not in found:
                problems.append(f"{label}: individual.column: {table.source} has no column "
                                f"{table.individual.column}")
            for column_name, column in table.columns.items():
                if column_name not in found:
                    problems.append(f"{label}: columns.{column_name}: {table.source} has no "
                                    "such column")
                    continue
                type_name = found[column_name]
                category = _TYPE_CATEGORIES.get(type_name.partition("(")[0], "X")
                if category not in KIND_TYPE_CATEGORIES[column.kind]:
                    problems.append(f"{label}: columns.{column_name}: kind {column.kind} does "
                                    f"not fit Spark's type {type_name}")
    finally:
        backend.close()
    return problems
