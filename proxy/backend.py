"""The backend database: runs rewritten queries, read-only, from a connection pool.

With ``proxy.ledger`` this is the only module the engine reaches PostgreSQL through (the catalog
mirror and the demo loader keep connections of their own, for catalog questions and set-up).
Connections are in autocommit mode with ``default_transaction_read_only`` on, so every query is
its own read-only transaction, and carry a statement timeout. Backend error text never leaves
this module: callers get a HushError that says only that the query could not run, because an error message
about a particular row would be a side channel.
"""

from __future__ import annotations

import logging
import threading
from typing import Any, Protocol

import psycopg
from psycopg_pool import ConnectionPool

from proxy.errors import INTERNAL_ERROR, QUERY_CANCELED, HushError

log = logging.getLogger("hushql.backend")


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
        self.cancelled = False

    def cancel(self) -> None:
        with self._lock:
            self.cancelled = True
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


class Backend:
    """A pool of read-only connections to the database holding the protected tables."""

    def __init__(self, dsn: str, *, pool_size: int = 8, statement_timeout_ms: int = 300_000,
                 open_timeout: float = 30.0) -> None:
        self.dsn = dsn
        self._timeout = statement_timeout_ms
        self._pool = ConnectionPool(dsn, min_size=1, max_size=pool_size, open=False,
                                    configure=self._configure, name="hushql-backend")
        self._pool.open(wait=True, timeout=open_timeout)

    def _configure(self, connection: psycopg.Connection[Any]) -> None:
        # Autocommit with read-only default transactions: one round trip per query, and the
        # session still cannot write.
        connection.autocommit = True
        with connection.cursor() as cursor:
            cursor.execute("SET default_transaction_read_only = on")
            cursor.execute(f"SET statement_timeout = {int(self._timeout)}")
            # sqlglot writes string literals with backslashes unescaped: only sound when on.
            cursor.execute("SET standard_conforming_strings = on")

    def run(self, sql: str, control: QueryControl | None = None,
            settings: dict[str, str] | None = None) -> list[tuple[Any, ...]]:
        """Run one rewritten query and return all its rows (one per cell, so few).

        ``settings`` are set on the session just before the query (set_config(..., false)); every
        query that reads one sets it first, so a value left on a pooled connection is never used.

        Raises HushError 57014 when cancelled, XX000 on any other failure (no backend text).
        """
        try:
            with self._pool.connection() as connection:
                if control is not None and not control._attach(connection):
                    raise HushError(QUERY_CANCELED, "canceling statement due to user request")
                try:
                    with connection.cursor() as cursor:
                        for name, value in (settings or {}).items():
                            cursor.execute("SELECT set_config(%s, %s, false)", (name, value))
                        cursor.execute(sql, prepare=False)
                        return cursor.fetchall()
                finally:
                    if control is not None:
                        control._attach(None)
        except HushError:
            raise
        except psycopg.errors.QueryCanceled as error:
            if control is not None and control.cancelled:
                raise HushError(QUERY_CANCELED, "canceling statement due to user request") from None
            log.warning("backend query timed out: %s", type(error).__name__)
            raise HushError(QUERY_CANCELED, "canceling statement due to statement timeout",
                            hint="the query took longer than the proxy allows") from None
        except Exception as error:
            # Logged for the operator by class only; the text might quote a row value.
            log.error("backend query failed: %s", type(error).__name__)
            raise HushError(INTERNAL_ERROR, "the backend could not run the query",
                            hint="ask an administrator to check the table's policy and source") from None

    def column_types(self, relation: str) -> dict[str, str]:
        """Column name -> PostgreSQL type name of a backend relation (schema-qualified or not)."""
        with self._pool.connection() as connection, connection.cursor() as cursor:
            cursor.execute(
                "SELECT a.attname, format_type(a.atttypid, a.atttypmod) FROM pg_attribute a "
                "WHERE a.attrelid = to_regclass(%s) AND a.attnum > 0 AND NOT a.attisdropped",
                (relation,), prepare=False)
            return dict(cursor.fetchall())

    def close(self) -> None:
        self._pool.close()
