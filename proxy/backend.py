"""The backend database: runs rewritten queries, read-only, from a connection pool.

With ``proxy.ledger`` this is the only module the engine reaches PostgreSQL through (the catalog
mirror and the demo loader keep connections of their own, for catalog questions and set-up).
Connections are in autocommit mode with ``default_transaction_read_only`` on, so every query is
its own read-only transaction, and every query runs under the timeout its caller gives (the
proxy's own, never the analyst's), set on the connection just before it when it differs;
planner settings of the proxy's own (``BACKEND_SETTINGS``) are set once per connection. A
query text run often on a connection is prepared there (psycopg's ``prepare_threshold``, at
most ``PREPARED_PER_CONNECTION`` kept), so PostgreSQL parses and plans it once. Backend error
text never leaves this module: callers get a HushError that says only that the query could
not run, because an error message about a particular row would be a side channel.
"""

from __future__ import annotations

import logging
import threading
import weakref
from typing import Any, Protocol

import psycopg
import sqlglot
from psycopg_pool import ConnectionPool, PoolTimeout

from proxy import faults
from proxy.pooling import RECONNECT_GIVE_UP_SECONDS, check_idle
from proxy.errors import CONNECTION_FAILURE, INTERNAL_ERROR, QUERY_CANCELED, HushError

log = logging.getLogger("hushql.backend")

# How long a query waits for a pooled connection: long enough for any queue at full load, short
# enough that a client learns of a database outage within seconds rather than hanging.
BORROW_TIMEOUT_SECONDS = 10.0
_ASK_ADMIN = "ask an administrator to check the table's policy and source"
# Planner settings of every backend connection, fixed by the proxy (an analyst's SET never
# reaches the backend). Measured with benchmarks/bench_bounding.py at 10M rows (whole-table
# COUNT and SUM per household: 4.7x the plain query with the defaults, 3.5x without JIT, 2.7x
# with both):
# - jit off: a rewritten query is one large plan whose estimated cost passes every JIT
#   threshold, and compiling its ~100 expressions took longer (1.4 s) than JIT saved; the plain
#   query ran as fast with it off.
# - work_mem 32MB (PostgreSQL's default is 4MB): the per-(individual, cell) partials are a hash
#   aggregate with one group per individual and cell; at 4MB it spills to disk from about 10k
#   groups. Memory is shared: each sort or hash step of a query may use up to work_mem x
#   hash_mem_multiplier (64MB at the default 2) in each of its processes (the leader and up to
#   max_parallel_workers_per_gather workers), and a pool runs at most pool_size queries at once.
BACKEND_SETTINGS = {"jit": "off", "work_mem": "32MB"}
# Prepared statements each pooled connection keeps (psycopg prepares a text from its
# prepare_threshold-th run, 5 by default, and deallocates the least recently used beyond this).
# Saves PostgreSQL the parse and plan of a repeated rewritten query (about 0.09 ms of its 0.4 ms
# for a one-cell count, measured on this 2-core machine); bounded because a plan of the largest
# accepted statements is large in the server's memory.
PREPARED_PER_CONNECTION = 32
# SQLSTATEs of a server that is going away or not yet back (PostgreSQL Appendix A, classes 08
# and 57P0x); a lost socket has none.
_GONE_STATES = ("57P01", "57P02", "57P03")


def _connection_lost(error: psycopg.OperationalError) -> bool:
    """True when the error means the connection or the server went away, not the query failed."""
    state = error.sqlstate
    return state is None or state in _GONE_STATES or state.startswith("08")


class Cancellable(Protocol):
    """What a running query can be cancelled through (a psycopg connection, a Spark tag)."""

    def cancel_safe(self, timeout: float) -> None: ...


class QueryControl:
    """Lets another thread cancel the backend query a session is waiting on.

    The session creates one per statement; ``cancel()`` may be called at any time, before, during
    or after the query (before: the query is cancelled as soon as it starts).
    """

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._connection: Cancellable | None = None
        self._cancelled = threading.Event()

    @property
    def cancelled(self) -> bool:
        return self._cancelled.is_set()

    def wait(self, seconds: float) -> bool:
        """Sleep up to ``seconds``, waking early on cancel(); True when cancelled."""
        return self._cancelled.wait(max(0.0, seconds))

    def cancel(self) -> None:
        with self._lock:
            self._cancelled.set()
            connection = self._connection
        if connection is not None:
            try:
                connection.cancel_safe(timeout=5)
            except Exception:  # the query may have just finished; nothing to cancel
                log.debug("cancel request failed", exc_info=True)

    def _attach(self, connection: Cancellable | None) -> bool:
        """Register the running connection; False when cancel() already happened."""
        with self._lock:
            self._connection = connection
            return not self.cancelled


class QueryBackend(Protocol):
    """What the engine needs from the engine holding the protected tables: ``Backend`` here
    (PostgreSQL) or ``proxy.spark_backend.SparkBackend``. Every method takes the rewrite's
    PostgreSQL text; a backend that speaks another dialect translates it itself."""

    # Up to this many cells, per-individual queries take the one-row-per-individual shape
    # (``proxy.sql.rewrite``, module notes 11); 0: never.
    wide_cells: int

    def run(self, sql: str, control: QueryControl | None = None,
            settings: dict[str, str] | None = None, *,
            timeout_ms: int | None = None) -> list[tuple[Any, ...]]:
        """All rows of one rewritten query; HushError 57014 / 08006 / XX000 (no backend text)."""
        ...

    def check(self, sql: str) -> None:
        """HushError 0A000 when the query cannot run exactly here (asked before any charge)."""
        ...

    def sent_sql(self, sql: str) -> str:
        """The text this backend sends for a rewritten query, laid out over lines for
        EXPLAIN (pure: runs nothing)."""
        ...

    def column_types(self, relation: str) -> dict[str, str]:
        """Column name -> PostgreSQL type name of a backend relation."""
        ...

    def unique_keys(self, relation: str) -> frozenset[frozenset[str]]:
        """The column sets the backend itself keeps unique in ``relation`` (enforced
        constraints only; none where it enforces none)."""
        ...

    def close(self) -> None: ...


class Backend:
    """A pool of read-only connections to the database holding the protected tables."""

    # PostgreSQL keeps the joined shape, whose steps it runs as one plan over shared results:
    # the wide shape's text grows with the square of its cells, and PostgreSQL's planner spent
    # minutes, uninterruptibly, on one of 183 cells (DEVELOPERS.md, speed notes).
    wide_cells = 0

    def __init__(self, dsn: str, *, pool_size: int = 8, statement_timeout_ms: int = 300_000,
                 open_timeout: float = 30.0) -> None:
        self.dsn = dsn
        self._timeout = statement_timeout_ms
        # The statement_timeout each pooled connection has now, so it is set only on change.
        self._timeouts: weakref.WeakKeyDictionary[psycopg.Connection[Any], int] = \
            weakref.WeakKeyDictionary()
        self._pool = ConnectionPool(dsn, min_size=1, max_size=pool_size, open=False,
                                    configure=self._configure, check=check_idle,
                                    reconnect_timeout=RECONNECT_GIVE_UP_SECONDS,
                                    name="hushql-backend")
        self._pool.open(wait=True, timeout=open_timeout)

    def _configure(self, connection: psycopg.Connection[Any]) -> None:
        # Autocommit with read-only default transactions: one round trip per query, and the
        # session still cannot write.
        connection.autocommit = True
        connection.prepared_max = PREPARED_PER_CONNECTION
        with connection.cursor() as cursor:
            cursor.execute("SET default_transaction_read_only = on")
            cursor.execute(f"SET statement_timeout = {int(self._timeout)}")
            # sqlglot writes string literals with backslashes unescaped: only sound when on.
            cursor.execute("SET standard_conforming_strings = on")
            for name, value in BACKEND_SETTINGS.items():
                cursor.execute("SELECT set_config(%s, %s, false)", (name, value))
        self._timeouts[connection] = int(self._timeout)

    def run(self, sql: str, control: QueryControl | None = None,
            settings: dict[str, str] | None = None, *,
            timeout_ms: int | None = None) -> list[tuple[Any, ...]]:
        """Run one rewritten query and return all its rows (one per cell, so few).

        ``settings`` are set on the session just before the query (set_config(..., false)); every
        query that reads one sets it first, so a value left on a pooled connection is never used.
        ``timeout_ms`` (default: the pool's) is the query's statement_timeout, set likewise.

        Raises HushError 57014 when cancelled or timed out, 08006 when the server is gone or unreachable (no
        connection within ``BORROW_TIMEOUT_SECONDS``), XX000 on any other failure (no backend
        text).
        """
        timeout = max(1, int(self._timeout if timeout_ms is None else timeout_ms))
        try:
            with self._pool.connection(timeout=BORROW_TIMEOUT_SECONDS) as connection:
                if control is not None and not control._attach(connection):
                    raise HushError(QUERY_CANCELED, "canceling statement due to user request")
                try:
                    with connection.cursor() as cursor:
                        delay = faults.seconds("during-query")  # test-only, else None
                        if delay is not None:
                            cursor.execute("SELECT pg_sleep(%s)", (delay,))
                        wanted = dict(settings or {})
                        if self._timeouts.get(connection) != timeout:
                            self._timeouts.pop(connection, None)  # unknown until it is set
                            wanted["statement_timeout"] = str(timeout)
                        if wanted:
                            cursor.execute("SELECT " + ", ".join(
                                ["set_config(%s, %s, false)"] * len(wanted)),
                                [part for item in wanted.items() for part in item])
                            self._timeouts[connection] = timeout
                        return _rows(cursor, sql)
                finally:
                    if control is not None:
                        control._attach(None)
        except HushError:
            raise
        except psycopg.errors.QueryCanceled as error:
            if control is not None and control.cancelled:
                raise HushError(QUERY_CANCELED, "canceling statement due to user request") from None
            log.warning("backend query timed out: %s", type(error).__name__)
            raise HushError(QUERY_CANCELED, "canceling statement due to the proxy's statement timeout",
                            hint=f"the proxy allows {timeout} ms per query; its epsilon stays "
                                 "spent") from None
        except (PoolTimeout, psycopg.OperationalError) as error:
            if not isinstance(error, PoolTimeout) and not _connection_lost(error):
                log.error("backend query failed: %s", type(error).__name__)
                raise HushError(INTERNAL_ERROR, "the backend could not run the query",
                                hint=_ASK_ADMIN) from None
            # The server went away (restart, shutdown, network): drop the pool's idle
            # connections it broke, so that queries work again as soon as it is back.
            log.warning("backend unavailable: %s", type(error).__name__)
            if not isinstance(error, PoolTimeout):
                self._discard_broken()
            raise HushError(CONNECTION_FAILURE, "the database is unavailable or too busy; the "
                            "query did not complete", hint="try again shortly") from None
        except Exception as error:
            # Logged for the operator by class only; the text might quote a row value.
            log.error("backend query failed: %s", type(error).__name__)
            raise HushError(INTERNAL_ERROR, "the backend could not run the query",
                            hint=_ASK_ADMIN) from None

    def _discard_broken(self) -> None:
        """Has the pool test its idle connections and replace the broken ones; never raises."""
        try:
            self._pool.check()
        except Exception:
            log.debug("pool check failed", exc_info=True)

    def check(self, sql: str) -> None:
        """Raise HushError when this backend cannot run a rewritten query exactly; PostgreSQL
        runs every one (the rewrite is written for it)."""

    def sent_sql(self, sql: str) -> str:
        """The rewritten query as sent, over several lines (sqlglot's pretty printer); as it
        is if it cannot be laid out."""
        try:
            return sqlglot.parse_one(sql, read="postgres").sql(dialect="postgres", pretty=True)
        except sqlglot.errors.SqlglotError:
            return sql

    def column_types(self, relation: str) -> dict[str, str]:
        """Column name -> PostgreSQL type name of a backend relation (schema-qualified or not)."""
        with self._pool.connection() as connection, connection.cursor() as cursor:
            cursor.execute(
                "SELECT a.attname, format_type(a.atttypid, a.atttypmod) FROM pg_attribute a "
                "WHERE a.attrelid = to_regclass(%s) AND a.attnum > 0 AND NOT a.attisdropped",
                (relation,), prepare=False)
            return dict(cursor.fetchall())

    def unique_keys(self, relation: str) -> frozenset[frozenset[str]]:
        """The column sets the database itself keeps unique in a backend relation: the key
        columns of each valid, immediate, non-partial btree unique index (a PRIMARY KEY or
        UNIQUE constraint, or CREATE UNIQUE INDEX) on plain columns only, each with its type's
        default equality and its own collation, so that no two rows agree on all of them by
        GROUP BY's equality. Only ordinary tables without inheritance children (whose rows a
        query would also read) qualify; views none."""
        with self._pool.connection() as connection, connection.cursor() as cursor:
            cursor.execute(_UNIQUE_KEYS, (relation,), prepare=False)
            return frozenset(frozenset(names) for (names,) in cursor.fetchall())

    def close(self) -> None:
        self._pool.close()


def _rows(cursor: psycopg.Cursor[Any], sql: str) -> list[tuple[Any, ...]]:
    """All rows of ``sql``, prepared once it is run often. A statement prepared before a source
    table changed type fails with 0A000 ("cached plan must not change result type"); the error
    stands (the query is not run again: that would stretch its time), but the connection's
    prepared statements are deallocated first (psycopg forgets them on seeing DEALLOCATE ALL),
    so the next run is planned afresh instead of failing the same way."""
    try:
        cursor.execute(sql)
    except psycopg.errors.FeatureNotSupported:
        cursor.execute("DEALLOCATE ALL")
        raise
    return cursor.fetchall()


# pg_index's fields (PostgreSQL documentation, "pg_index"): indkey, indclass and indcollation
# are 0-based vectors over the index's columns, the first indnkeyatts of them its key (the rest
# INCLUDE columns, which uniqueness does not cover); indkey is 0 for an expression; indimmediate
# is false for a DEFERRABLE constraint; indisvalid is false for an index still being built or
# failed. relhassubclass may stay true after the last child is dropped (then no key qualifies:
# the safe side), never false while one exists. An index counts only when every key column
# passes (the count of passing columns is indnkeyatts).
_UNIQUE_KEYS = """
SELECT array_agg(a.attname::text)
FROM pg_catalog.pg_index i
JOIN pg_catalog.pg_class t ON t.oid = i.indrelid
JOIN pg_catalog.pg_class x ON x.oid = i.indexrelid
JOIN pg_catalog.pg_am am ON am.oid = x.relam
CROSS JOIN LATERAL generate_series(0, i.indnkeyatts - 1) AS k(n)
JOIN pg_catalog.pg_opclass o ON o.oid = i.indclass[k.n]
JOIN pg_catalog.pg_attribute a ON a.attrelid = i.indrelid AND a.attnum = i.indkey[k.n]
WHERE i.indrelid = to_regclass(%s) AND t.relkind = 'r' AND NOT t.relhassubclass
  AND i.indisunique AND i.indimmediate AND i.indisvalid
  AND i.indpred IS NULL AND i.indexprs IS NULL AND am.amname = 'btree' AND o.opcdefault
  AND i.indcollation[k.n] = a.attcollation AND NOT a.attisdropped
GROUP BY i.indexrelid, i.indnkeyatts
HAVING count(*) = i.indnkeyatts
"""
