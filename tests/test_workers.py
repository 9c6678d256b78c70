"""Several serving processes: ``hushql serve --workers N``, and two serve processes on one
ledger under 64 concurrent clients.

These run real ``hushql serve`` processes against the test PostgreSQL; each takes some seconds.
"""

from __future__ import annotations

import collections
import os
import signal
import socket
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from decimal import Decimal
from pathlib import Path

import psycopg
import pytest

from proxy.demo import load_scenario
from proxy.wire.workers import SLOT_SHIFT, WorkerServer, slot_of
from tests.serve_processes import (drop_mirrors, policies_with_budgets, read_books,
                                   serving)

QUERY = "SELECT COUNT(*) FROM households"
READINGS_QUERY = "SELECT COUNT(*) FROM readings"
# Every asking pays for a new answer (hushql.fresh): these tests count charges.
FRESH = "-c hushql.fresh=on"


@pytest.fixture(scope="module")
def demo_dsn(module_dsn: str) -> str:
    load_scenario(module_dsn, households=200, progress=False)
    yield module_dsn
    drop_mirrors(module_dsn)


def _reset_ledger(dsn: str) -> None:
    with psycopg.connect(dsn, autocommit=True) as conn:
        conn.execute("DROP SCHEMA IF EXISTS hushql CASCADE")


# ---- cancel routing, without processes -----------------------------------------------------

def test_a_cancel_for_another_slot_is_forwarded_to_that_slot() -> None:
    """Worker 0 gets a cancel for a process id of slot 1: it forwards it, and slot 1 cancels
    the session when the secret key matches (and only then)."""
    pairs = [socket.socketpair(socket.AF_UNIX, socket.SOCK_DGRAM) for _ in range(2)]
    inboxes, routes = [p[0] for p in pairs], [p[1] for p in pairs]
    for inbox in inboxes:
        inbox.setblocking(False)
    listener = socket.socket()
    zero = WorkerServer(None, slot=0, listener=listener, routes=routes)
    one = WorkerServer(None, slot=1, listener=listener, routes=routes)
    try:
        held = _HeldConnection(secret_key=-12345)
        pid = next(one._pids) & 0x7FFFFFFF
        one._by_pid[pid] = held  # type: ignore[assignment]
        assert slot_of(pid) == 1 and slot_of(next(zero._pids)) == 0
        zero.cancel(pid, 999)  # wrong key: forwarded, then refused by the owner
        one.receive_forwarded(inboxes[1])
        assert held.session.reasons == []
        zero.cancel(pid, -12345)
        assert held.session.reasons == []  # nothing happens until slot 1 reads its inbox
        one.receive_forwarded(inboxes[1])
        assert held.session.reasons == ["user"]
        zero.receive_forwarded(inboxes[0])  # nothing was ever sent to slot 0
        one.receive_forwarded(inboxes[1])  # and each cancel was delivered once
        assert held.session.reasons == ["user"]
    finally:
        one.executor.shutdown()
        zero.executor.shutdown()
        listener.close()
        for a, b in pairs:
            a.close()
            b.close()


class _RecordingSession:
    def __init__(self) -> None:
        self.reasons: list[str] = []

    def cancel(self, reason: str = "user") -> None:
        self.reasons.append(reason)


class _HeldConnection:
    """What WireServer.cancel looks at on a connection: its secret key and its session."""

    def __init__(self, secret_key: int) -> None:
        self.secret_key = secret_key
        self.session = _RecordingSession()


def test_process_ids_carry_the_slot_and_stay_positive_int32() -> None:
    listener = socket.socket()
    try:
        server = WorkerServer(None, slot=127, listener=listener, routes=[])
        ids = [next(server._pids) & 0x7FFFFFFF for _ in range(1000)]
        server.executor.shutdown()
    finally:
        listener.close()
    assert all(0 < pid < 2**31 and slot_of(pid) == 127 and pid >> SLOT_SHIFT == 127
               for pid in ids)
    assert len(set(ids)) == len(ids)


# ---- real processes ----------------------------------------------------------------------

def test_workers_share_one_port_and_cancels_reach_the_query_wherever_they_land(
        demo_dsn: str, tmp_path: Path) -> None:
    """Two workers; every connection's query sleeps 20 s in the backend (test fault), and each
    is cancelled from a new connection that either worker may accept. All must end with 57014
    well before the 20 s: a cancel that landed on the other worker was forwarded."""
    _reset_ledger(demo_dsn)
    with serving(demo_dsn, tmp_path / "serve.log", workers=2, pool_size=36,
                 env={"HUSHQL_TEST_FAULTS": "during-query=20"}) as served:
        served.wait_for_log("serving (pid", count=2)
        # Fresh answers: the same question asked again must reach the backend each time.
        conns = [served.connect(options=FRESH) for _ in range(4)]
        # The kernel picks the worker; connect until both hold some (at most 16 in all).
        while len({slot_of(c.info.backend_pid) for c in conns}) < 2 and len(conns) < 16:
            conns.append(served.connect(options=FRESH))
        slots = {slot_of(c.info.backend_pid) for c in conns}
        assert slots == {0, 1}, f"{len(conns)} connections all went to slot(s) {slots}"
        started = time.monotonic()

        def ask_then_cancelled(conn: psycopg.Connection) -> str | None:
            try:
                conn.execute(QUERY)
            except psycopg.Error as error:
                return error.sqlstate
            return None

        with ThreadPoolExecutor(len(conns)) as pool:
            futures = [pool.submit(ask_then_cancelled, c) for c in conns]
            served.wait_for_log("pausing at during-query", count=len(conns))
            for conn in conns:
                conn.cancel_safe(timeout=5)
            outcomes = [f.result(timeout=30) for f in futures]
        elapsed = time.monotonic() - started
        for conn in conns:
            conn.close()
    assert outcomes == ["57014"] * len(conns)
    assert elapsed < 15, f"cancels took {elapsed:.1f} s: some waited for the 20 s pause"


def test_connections_are_spread_evenly_over_the_workers(demo_dsn: str, tmp_path: Path) -> None:
    """Bursts of 16 clients connecting at once to 2 workers started on an empty ledger: both
    workers start (none dies importing the policy while the other does), and in each burst each
    worker takes 6 to 10 of the clients. Before, a worker that started second was often never
    up (it died on the policy import), so one process served every client; and with both up,
    asyncio's accept let one worker take 13 of 16 (this test failed 2 runs in 4 on it)."""
    _reset_ledger(demo_dsn)
    spreads = []
    # A copy whose login limits let 16 clients log in at once from one address.
    policies = policies_with_budgets(tmp_path, planner="3.0", households_cap="20")
    with serving(demo_dsn, tmp_path / "serve.log", workers=2, policies=policies) as served:
        served.wait_for_log("serving (pid", count=2)
        for _ in range(3):
            with ThreadPoolExecutor(16) as pool:  # a burst, as a pool of clients starts
                conns = list(pool.map(lambda _: served.connect(), range(16)))
            try:
                spreads.append(collections.Counter(slot_of(c.info.backend_pid) for c in conns))
                assert conns[0].execute(QUERY).fetchone()[0] is not None
            finally:
                for conn in conns:
                    conn.close()
        log = (tmp_path / "serve.log").read_text()
    assert "failed" not in log, log
    assert all(sorted(held) == [0, 1] and min(held.values()) >= 6 for held in spreads), spreads


def test_a_killed_worker_is_replaced_and_the_port_keeps_answering(
        demo_dsn: str, tmp_path: Path) -> None:
    _reset_ledger(demo_dsn)
    with serving(demo_dsn, tmp_path / "serve.log", workers=2) as served:
        log = served.wait_for_log("serving (pid", count=2)
        pids = [int(line.rsplit("pid ", 1)[1].rstrip(")"))
                for line in log.splitlines() if "serving (pid" in line]
        os.kill(pids[0], signal.SIGKILL)
        served.wait_for_log("exited with signal SIGKILL; replacing it")
        served.wait_for_log("serving (pid", count=3)
        answers = 0
        for _ in range(10):
            with served.connect() as conn:
                assert conn.execute(QUERY).fetchone()[0] is not None
                answers += 1
    assert answers == 10
    assert served.process.returncode == 0


def test_a_worker_above_the_memory_limit_is_replaced_and_its_sessions_finish(
        demo_dsn: str, tmp_path: Path) -> None:
    """With a 1 MB limit every worker is over it: each is replaced within a check period, while
    a session it already holds keeps working (the old worker drains) and newcomers are served."""
    _reset_ledger(demo_dsn)
    with serving(demo_dsn, tmp_path / "serve.log", workers=2,
                 extra=("--worker-memory-mb", "1")) as served:
        with served.connect(autocommit=True) as held:
            assert held.execute(QUERY).fetchone() is not None
            served.wait_for_log("above the limit; replacing it", count=2, timeout=20)
            assert held.execute(QUERY).fetchone() is not None
        with served.connect(autocommit=True) as newcomer:
            assert newcomer.execute(QUERY).fetchone() is not None
    assert served.process.returncode == 0


def test_two_serve_processes_on_one_ledger_never_overspend_nor_lose_a_charge(
        demo_dsn: str, tmp_path: Path) -> None:
    """Two `hushql serve` processes, one ledger, 64 clients at once, all as the planner (budget
    2.0). Each client asks households twice (cap 0.8), then readings twice: at 0.1 a query,
    exactly 8 households answers and 20 answers in all can be paid for, out of 256 tries.
    Every answer a client received must have its charge row, the books must add up, and both
    limits must be reached exactly and never passed."""
    _reset_ledger(demo_dsn)
    policies = policies_with_budgets(tmp_path, planner="2.0", households_cap="0.8")
    clients, queries = 64, (QUERY, QUERY, READINGS_QUERY, READINGS_QUERY)
    with serving(demo_dsn, tmp_path / "a.log", policies=policies) as first, \
            serving(demo_dsn, tmp_path / "b.log", policies=policies) as second:
        barrier = threading.Barrier(clients)

        def client(index: int) -> dict[str, list[str]]:
            """Per query text, the outcome of each try: "ok" or the SQLSTATE."""
            outcomes: dict[str, list[str]] = {QUERY: [], READINGS_QUERY: []}
            try:
                conn = (first, second)[index % 2].connect(autocommit=True, options=FRESH)
            except psycopg.Error as error:
                barrier.abort()  # the others stop waiting; this error is the one to see
                raise AssertionError(f"client {index} could not log in: {error}") from None
            with conn:
                barrier.wait(timeout=180)
                for query in queries:
                    try:
                        conn.execute(query).fetchone()
                        outcomes[query].append("ok")
                    except psycopg.Error as error:
                        outcomes[query].append(str(error.sqlstate))
            return outcomes

        started = time.monotonic()
        with ThreadPoolExecutor(clients) as pool:
            results = list(pool.map(client, range(clients)))
        elapsed = time.monotonic() - started
    books = read_books(demo_dsn)
    outcomes = {q: [o for r in results for o in r[q]] for q in (QUERY, READINGS_QUERY)}
    answered = {q: outcomes[q].count("ok") for q in outcomes}
    refused = sum(o.count("53400") for o in outcomes.values())
    print(f"\ntwo processes, {clients} clients, {clients * len(queries)} tries in "
          f"{elapsed:.1f} s: {answered[QUERY]} households and {answered[READINGS_QUERY]} "
          f"readings answers, {refused} refused with 53400; ledger: planner spent "
          f"{books.analyst_spent['planner']} of 2.0, households {books.table_spent['households']}"
          f" of 0.8, {len(books.charges)} charge rows")
    assert set(outcomes[QUERY] + outcomes[READINGS_QUERY]) <= {"ok", "53400"}
    # Never overspent; both limits bind exactly (0.1 steps fill 0.8 and 2.0 exactly).
    assert books.table_spent["households"] == Decimal("0.8") and answered[QUERY] == 8
    assert books.analyst_spent["planner"] == Decimal("2.0")
    assert books.consistent()
    # Every released answer has its durable charge row, and no charge row is extra or lost.
    assert len(books.charges) == sum(answered.values()) == 20
    assert sum(1 for c in books.charges if c[2] == ["households"]) == answered[QUERY]
    assert all(c[3] == Decimal("0.1") and c[1] == "planner" for c in books.charges)
