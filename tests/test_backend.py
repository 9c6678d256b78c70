"""The backend pool: read-only, cancellable, and silent about what went wrong."""

from __future__ import annotations

import threading
import time

import psycopg
import pytest

from proxy.backend import BACKEND_SETTINGS, Backend, QueryControl
from proxy.errors import HushError


@pytest.fixture
def backend(fresh_dsn: str):
    with psycopg.connect(fresh_dsn, autocommit=True) as conn:
        conn.execute("CREATE TABLE secret_rows (name text)")
        conn.execute("INSERT INTO secret_rows VALUES ('Ada Example')")
    pool = Backend(fresh_dsn, pool_size=2, statement_timeout_ms=2000)
    yield pool
    pool.close()


def test_a_running_query_can_be_cancelled(backend: Backend) -> None:
    control = QueryControl()
    threading.Timer(0.3, control.cancel).start()
    started = time.monotonic()
    with pytest.raises(HushError) as error:
        backend.run("SELECT pg_sleep(10)", control)
    assert error.value.sqlstate == "57014"
    assert time.monotonic() - started < 5
    assert backend.run("SELECT 1") == [(1,)]  # the connection went back to the pool usable


def test_every_connection_runs_with_the_proxys_planner_settings(backend: Backend) -> None:
    # Two queries at once take both pooled connections; each must have the settings.
    found: list[list[tuple]] = []
    threads = [threading.Thread(target=lambda: found.append(backend.run(
        "SELECT current_setting('jit'), current_setting('work_mem'), pg_sleep(0.3)")))
        for _ in range(2)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert len(found) == 2
    for rows in found:  # PostgreSQL shows work_mem as set ('32MB'), jit as 'off'
        assert rows[0][:2] == (BACKEND_SETTINGS["jit"], BACKEND_SETTINGS["work_mem"])
    with psycopg.connect(backend.dsn, autocommit=True) as other:  # the database's own stay
        assert other.execute("SHOW work_mem").fetchone()[0] != BACKEND_SETTINGS["work_mem"]


def test_cancelling_before_the_query_starts_prevents_it(backend: Backend) -> None:
    control = QueryControl()
    control.cancel()
    with pytest.raises(HushError) as error:
        backend.run("SELECT 1", control)
    assert error.value.sqlstate == "57014"


def test_statement_timeout_ends_slow_queries(backend: Backend) -> None:
    with pytest.raises(HushError) as error:
        backend.run("SELECT pg_sleep(10)")
    assert error.value.sqlstate == "57014" and "timeout" in error.value.message


def test_each_query_runs_under_the_timeout_its_caller_gives(backend: Backend) -> None:
    with pytest.raises(HushError) as error:
        backend.run("SELECT pg_sleep(1)", timeout_ms=100)
    assert error.value.sqlstate == "57014" and "100 ms" in (error.value.hint or "")
    # The next queries on the pool (two connections) are back under the pool's 2 s default.
    for _ in range(4):
        assert backend.run("SELECT current_setting('statement_timeout')") == [("2s",)]
    assert backend.run("SELECT current_setting('statement_timeout')", timeout_ms=250) == [("250ms",)]


def test_backend_errors_never_carry_backend_text(backend: Backend) -> None:
    # The error PostgreSQL raises here quotes the row value; the proxy must not pass it on.
    with pytest.raises(HushError) as error:
        backend.run("SELECT CAST(name AS integer) FROM secret_rows")
    assert error.value.sqlstate == "XX000"
    assert "Ada" not in error.value.message + (error.value.hint or "") + (error.value.detail or "")


def test_backend_sessions_are_read_only(backend: Backend, fresh_dsn: str) -> None:
    with pytest.raises(HushError):
        backend.run("DELETE FROM secret_rows")
    with psycopg.connect(fresh_dsn) as conn:
        assert conn.execute("SELECT count(*) FROM secret_rows").fetchone() == (1,)


def test_column_types_are_read_from_the_catalog(backend: Backend) -> None:
    assert backend.column_types("public.secret_rows") == {"name": "text"}


PREPARED = ("SELECT count(*) FROM pg_prepared_statements "
            "WHERE statement = 'SELECT sum(amount) FROM amounts'")


def test_a_repeated_query_is_prepared_and_survives_a_change_of_type(fresh_dsn: str) -> None:
    """A text run often is prepared on its connection; after its table changes type the
    prepared plan fails once (closed: no backend text) and the next run is planned afresh."""
    with psycopg.connect(fresh_dsn, autocommit=True) as conn:
        conn.execute("CREATE TABLE amounts (amount integer)")
        conn.execute("INSERT INTO amounts VALUES (2), (3)")
    backend = Backend(fresh_dsn, pool_size=1)
    query = "SELECT sum(amount) FROM amounts"
    try:
        for _ in range(6):
            assert backend.run(query) == [(5,)]
        assert backend.run(PREPARED) == [(1,)]
        with psycopg.connect(fresh_dsn, autocommit=True) as conn:
            conn.execute("ALTER TABLE amounts ALTER COLUMN amount TYPE numeric")
        with pytest.raises(HushError) as error:
            backend.run(query)  # sum(integer) was bigint; sum(numeric) is numeric
        assert error.value.sqlstate == "XX000"
        assert backend.run(PREPARED) == [(0,)]
        assert backend.run(query) == [(5,)]
    finally:
        backend.close()
