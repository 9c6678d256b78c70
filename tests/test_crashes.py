"""Crashes and faults: a serve process killed in mid-answer, PostgreSQL restarting under a
running proxy. Each test can fail: a charge committed after release, or an uncommitted one,
would leave an answer without its row; a proxy that kept stale connections would never recover.

The kill points are the test-only fault switch of ``proxy.faults`` (``HUSHQL_TEST_FAULTS``).
The restart test stops and starts a private PostgreSQL of its own, never the shared one.
"""

from __future__ import annotations

import os
import re
import shutil
import signal
import tempfile
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from decimal import Decimal
from pathlib import Path

import psycopg
import pytest

from proxy.demo import load_scenario
from proxy.localpg import find_binaries, free_port, start_local_postgres
from tests.serve_processes import read_books, serving

QUERY = "SELECT COUNT(*) FROM households"
# What a client may see while the database is away: connection failure (class 08) or the
# server's shutdown codes (PostgreSQL Appendix A: 57P01 admin_shutdown, 57P03 cannot_connect_now).
OUTAGE_STATES = {"08006", "08001", "08003", "57P01", "57P03"}


@pytest.fixture(scope="module")
def demo_dsn(module_dsn: str) -> str:
    from tests.serve_processes import drop_mirrors

    load_scenario(module_dsn, households=100, progress=False)
    yield module_dsn
    drop_mirrors(module_dsn)


@pytest.mark.parametrize("point", ["after-reserve", "during-query"])
def test_a_serve_process_killed_mid_answer_released_nothing_and_lost_no_charge(
        demo_dsn: str, tmp_path: Path, point: str) -> None:
    with psycopg.connect(demo_dsn, autocommit=True) as conn:
        conn.execute("DROP SCHEMA IF EXISTS hushql CASCADE")
    got: dict[str, object] = {}
    with serving(demo_dsn, tmp_path / "first.log",
                 env={"HUSHQL_TEST_FAULTS": f"{point}=60"}) as served:
        conn = served.connect(autocommit=True)

        def ask() -> None:
            try:
                got["answer"] = conn.execute(QUERY).fetchall()
            except psycopg.Error as error:
                got["error"] = error

        asking = threading.Thread(target=ask)
        asking.start()
        log = served.wait_for_log(f"pausing at {point}")
        pid = int(re.search(rf"pausing at {point} \(pid (\d+)\)", log).group(1))  # type: ignore[union-attr]
        assert pid == served.process.pid
        os.kill(pid, signal.SIGKILL)
        asking.join(30)
        assert not asking.is_alive()
        conn.close()
    assert "answer" not in got and isinstance(got.get("error"), psycopg.OperationalError)
    books = read_books(demo_dsn)
    # The charge was durable before the kill, stands, and is the only one.
    assert [(c[1], c[3], c[4]) for c in books.charges] == [("planner", Decimal("0.1"),
                                                             "reserved")]
    assert books.consistent() and books.analyst_spent["planner"] == Decimal("0.1")
    # Restarted without the fault: answers again, charging on top of the standing charge.
    with serving(demo_dsn, tmp_path / "second.log") as served:
        with served.connect(autocommit=True) as conn:
            assert conn.execute(QUERY).fetchone() is not None
    books = read_books(demo_dsn)
    assert books.consistent() and books.analyst_spent["planner"] == Decimal("0.2")
    assert [c[4] for c in books.charges] == ["reserved", "answered"]


def _outcome(conn: psycopg.Connection) -> str:
    """"ok", or the SQLSTATE of a clean error; a client-side failure is reported as such."""
    try:
        conn.execute(QUERY).fetchone()
        return "ok"
    except psycopg.Error as error:
        assert error.sqlstate is not None, f"no SQLSTATE: the proxy dropped the client ({error})"
        assert "Traceback" not in str(error) and "psycopg" not in str(error)
        return error.sqlstate


@pytest.mark.skipif(find_binaries() is None, reason="needs PostgreSQL server binaries")
def test_postgresql_restarting_under_the_proxy_gives_clean_errors_then_recovers(
        tmp_path: Path) -> None:
    folder = Path(tempfile.mkdtemp(prefix="hushql-restart-pg-"))
    port = free_port()
    database = start_local_postgres(folder, port=port)
    try:
        load_scenario(database.dsn, households=100, progress=False)
        with serving(database.dsn, tmp_path / "serve.log", workers=2) as served:
            conn = served.connect(autocommit=True)
            assert _outcome(conn) == "ok"
            database.stop()
            newcomer = served.connect(autocommit=True)  # signs in without the database
            with ThreadPoolExecutor(2) as pool:  # together: each waits out the pool's timeout
                during = list(pool.map(_outcome, [conn, newcomer]))
            newcomer.close()
            assert set(during) <= OUTAGE_STATES, during
            database = start_local_postgres(folder, port=port)
            after: list[str] = []
            deadline = time.monotonic() + 40
            while not after or after[-1] != "ok":
                assert time.monotonic() < deadline, f"no recovery: {after}"
                after.append(_outcome(conn))
                if after[-1] != "ok":
                    time.sleep(0.5)
            assert set(after) <= OUTAGE_STATES | {"ok"}, after
            with served.connect(autocommit=True) as newcomer:
                assert _outcome(newcomer) == "ok"
            conn.close()
        assert served.process.returncode == 0
        print(f"\noutage: {during}; after the restart: {after}")
        books = read_books(database.dsn)
        assert books.consistent()
        assert "Traceback" not in served.log()
    finally:
        database.stop()
        shutil.rmtree(folder, ignore_errors=True)
