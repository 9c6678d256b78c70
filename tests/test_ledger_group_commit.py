"""Group commit in the ledger: reservations committed together stay exact.

What must hold: a batch charges exactly what the same reservations would charge one after
another (never more than a budget or a cap); a refused reservation in a batch charges nothing
and does not stop the others; concurrent reservations really are committed in batches; two
ledgers (two processes) batching over overlapping analysts and tables never deadlock.
"""

from __future__ import annotations

import random
import threading
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from decimal import Decimal
from typing import Any

import psycopg
import pytest
from psycopg.types.json import Jsonb

from proxy.errors import BUDGET_EXHAUSTED, HushError
from proxy.ledger import Ledger, _GroupCommit, _Request, statement_hash
from proxy.policy import Individual, Policies
from tests.test_ledger import charge_count, make_policies, open_ledger, query  # noqa: F401

D = Decimal


def test_a_batch_checks_each_reservation_against_the_ones_before_it(
        fresh_dsn: str, open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger()
    ledger.sync_budgets(make_policies({"planner": "0.3", "researcher": "1.0"},
                                      {"households": "0.25", "readings": None}))
    batch = [_Request("planner", ["households"], D("0.1"), "q1", statement_hash("q1"), "f"),
             _Request("planner", ["households"], D("0.1"), "q2", statement_hash("q2"), "f"),
             _Request("planner", ["households"], D("0.1"), "q3", statement_hash("q3"), "f"),  # cap: 0.05 left
             _Request("nobody", [], D("0.1"), "q4", statement_hash("q4"), "f"),
             _Request("planner", ["readings"], D("0.1"), "q5", statement_hash("q5"), "f"),  # budget: 0.1 left
             _Request("planner", ["readings"], D("0.1"), "q6", statement_hash("q6"), "f"),  # budget: 0 left
             _Request("researcher", ["readings", "households"], D("0.01"), "q7", statement_hash("q7"), "f")]
    rows = ledger._reserve_together(batch)
    refusals = [row[1] for row in rows]
    assert refusals == [None, None, "table cap", "unknown analyst", None, "analyst budget",
                        None]
    assert ledger.spent("planner") == D("0.3")
    assert ledger.spent("researcher") == D("0.01")
    assert ledger.table_remaining("households") == D("0.04")
    assert [r[0] for r in query(fresh_dsn, "SELECT statement FROM hushql.charges ORDER BY id")] \
        == ["q1", "q2", "q5", "q7"]


def test_concurrent_reservations_are_batched_and_never_overspend(
        fresh_dsn: str, open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger(pool_size=8)
    ledger.sync_budgets(make_policies({"planner": "2.0"}, {"households": "20"}))
    sizes: list[int] = []
    run = ledger._group._run

    def recording(requests: list[_Request]) -> list[tuple[object, ...]]:
        sizes.append(len(requests))
        return run(requests)

    ledger._group._run = recording  # type: ignore[method-assign]
    threads = 64
    barrier = threading.Barrier(threads)

    def reserve(_: int) -> str:
        barrier.wait(timeout=30)
        try:
            ledger.reserve("planner", ["households"], D("0.1"), "SELECT 1", "f")
            return "ok"
        except HushError as error:
            return error.sqlstate

    with ThreadPoolExecutor(threads) as pool:
        outcomes = list(pool.map(reserve, range(threads)))
    assert outcomes.count("ok") == 20 and outcomes.count(BUDGET_EXHAUSTED) == 44
    assert ledger.spent("planner") == D("2.0") and charge_count(fresh_dsn) == 20
    assert sum(sizes) == threads
    assert max(sizes) > 1, f"no batch held more than one reservation: {sizes}"


class _HeldRuns:
    """A stand-in for the database: records each batch (as (analyst, statement) pairs) and
    holds the batches of analysts in ``held`` until ``release`` is set."""

    def __init__(self, held: set[str]) -> None:
        self.held = held
        self.release = threading.Event()
        self.started = threading.Event()
        self.batches: list[list[tuple[str, str]]] = []
        self._lock = threading.Lock()

    def __call__(self, requests: list[_Request]) -> list[tuple[object, ...]]:
        with self._lock:
            self.batches.append([(r.analyst, r.statement) for r in requests])
        if any(r.analyst in self.held for r in requests):
            self.started.set()
            assert self.release.wait(10)
        return [(i, None, None, None, None, D(1), None) for i in range(len(requests))]


def _submit_all(group: _GroupCommit, requests: list[_Request]) -> list[threading.Thread]:
    threads = [threading.Thread(target=group.submit, args=(r,)) for r in requests]
    for thread in threads:
        thread.start()
    return threads


def _request(analyst: str, statement: str, tables: tuple[str, ...] = ("households",)
             ) -> _Request:
    return _Request(analyst, list(tables), D("0.1"), statement, statement_hash(statement), "f")


def test_reservations_waiting_for_a_committing_row_go_in_one_next_batch() -> None:
    """While a batch of the planner commits, the planner's next reservations wait for it and
    are then committed together: not split among free slots into small batches queued on the
    same row lock (what the group commit did before)."""
    runs = _HeldRuns({"planner"})
    group = _GroupCommit(runs, limit=64, in_flight=4)
    first = _submit_all(group, [_request("planner", "first")])
    assert runs.started.wait(10)
    later = _submit_all(group, [_request("planner", f"later {i}") for i in range(6)])
    time.sleep(0.2)  # every later one is waiting by now
    assert len(runs.batches) == 1, runs.batches
    runs.release.set()
    for thread in first + later:
        thread.join(10)
    assert [len(batch) for batch in runs.batches] == [1, 6], runs.batches


def test_a_committing_batch_does_not_hold_up_reservations_for_other_rows() -> None:
    """The researcher, on another table, is committed while the planner's batch is held; a
    reservation sharing the planner's table waits for it. Batches keep ``limit``."""
    runs = _HeldRuns({"planner"})
    group = _GroupCommit(runs, limit=2, in_flight=4)
    held = _submit_all(group, [_request("planner", "held", ("households",))])
    assert runs.started.wait(10)
    others = _submit_all(group, [_request("researcher", f"r{i}", ("tariffs",))
                                 for i in range(5)])
    for thread in others:
        thread.join(10)
        assert not thread.is_alive(), "the researcher waited for the planner's batch"
    sharing = _submit_all(group, [_request("auditor", "shares households", ("households",))])
    time.sleep(0.2)
    assert ("auditor", "shares households") not in [r for b in runs.batches for r in b]
    runs.release.set()
    for thread in held + sharing:
        thread.join(10)
    assert all(len(batch) <= 2 for batch in runs.batches), runs.batches
    assert sorted(r for b in runs.batches for r in b) == sorted(
        [("planner", "held"), ("auditor", "shares households")]
        + [("researcher", f"r{i}") for i in range(5)])


def test_a_failing_batch_fails_its_reservations_and_frees_its_rows() -> None:
    calls = []

    def failing_once(requests: list[_Request]) -> list[tuple[object, ...]]:
        calls.append(len(requests))
        if len(calls) == 1:
            raise HushError("08006", "the ledger is unavailable")
        return [(1, None, None, None, None, D(1), None)] * len(requests)

    group = _GroupCommit(failing_once, limit=8, in_flight=2)
    with pytest.raises(HushError):
        group.submit(_request("planner", "fails"))
    assert group.submit(_request("planner", "then succeeds"))[0] == 1


def test_two_ledgers_batching_over_shared_rows_never_deadlock_nor_overspend(
        fresh_dsn: str, open_ledger: Callable[..., Ledger]) -> None:
    """Two ledgers with pools of their own, as two proxy processes; every reservation picks a
    random analyst and a random non-empty set of tables, so batches overlap in every order."""
    first, second = open_ledger(pool_size=8), open_ledger(pool_size=8)
    analysts = {"planner": "1.5", "researcher": "1.5", "auditor": "1.5"}
    first.sync_budgets(make_policies(analysts, {"households": "2.0", "readings": "2.0",
                                                "tariffs": None}))
    tables = ["households", "readings", "tariffs"]
    chooser = random.Random(2026)
    plans = [(chooser.choice(sorted(analysts)),
              chooser.sample(tables, chooser.randint(1, 3))) for _ in range(240)]

    def reserve(index: int) -> str:
        analyst, wanted = plans[index]
        ledger = (first, second)[index % 2]
        try:
            ledger.reserve(analyst, wanted, D("0.1"), "SELECT 1", "f")
            return "ok"
        except HushError as error:
            return error.sqlstate

    with ThreadPoolExecutor(32) as pool:
        outcomes = list(pool.map(reserve, range(len(plans))))
    assert set(outcomes) <= {"ok", BUDGET_EXHAUSTED}, set(outcomes)
    spent = dict(query(fresh_dsn, "SELECT analyst, spent FROM hushql.analyst_budgets"))
    table_spent = dict(query(fresh_dsn, "SELECT table_name, spent FROM hushql.table_budgets"))
    charged = query(fresh_dsn, "SELECT analyst, tables, epsilon FROM hushql.charges")
    assert len(charged) == outcomes.count("ok")
    for analyst, budget in analysts.items():
        assert spent[analyst] <= D(budget)
        assert spent[analyst] == sum((c[2] for c in charged if c[0] == analyst), D(0))
    for table in ("households", "readings"):
        assert table_spent[table] <= D("2.0")
        assert table_spent[table] == sum((c[2] for c in charged if table in c[1]), D(0))


def test_outcomes_skip_unknown_and_finished_charges(
        fresh_dsn: str, open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger()
    ledger.sync_budgets(make_policies({"planner": "1.0"}, {}))
    ids = [ledger.reserve("planner", [], D("0.1"), f"q{i}", "f").charge_id for i in range(3)]
    ledger.finish(ids[0], "failed")
    for charge in ids[1:]:
        ledger.finish(charge, "answered")
    for charge in (ids[0], 999_999):  # already finished, unknown: nothing recorded
        with pytest.raises(ValueError, match="unknown or already finished"):
            ledger.finish(charge, "answered")
    assert query(fresh_dsn, "SELECT outcome FROM hushql.charges ORDER BY id") == [
        ("failed",), ("answered",), ("answered",)]
    assert ledger.spent("planner") == D("0.3")  # a note never gives epsilon back


def _shared_population_policies(analysts: dict[str, str]) -> Policies:
    """households and readings in one population (cap the smaller of 8 and 6), tariffs a
    population of its own with no cap, pipes one with cap 2.5."""
    policies = make_policies(analysts, {"households": "8", "readings": "6",
                                        "tariffs": None, "pipes": "2.5"})
    shared = {name: table.model_copy(update={"individual": Individual(
        column="flag", population="households", most_rows=1)})
        for name, table in policies.tables.items() if name in ("households", "readings")}
    return Policies(access=policies.access, tables={**policies.tables, **shared})


def _books(dsn: str, schema: str) -> tuple[list[tuple[Any, ...]], ...]:
    return tuple(query(dsn, text.format(schema)) for text in (
        "SELECT analyst, spent FROM {}.analyst_budgets ORDER BY analyst",
        "SELECT population, spent FROM {}.population_budgets ORDER BY population",
        "SELECT table_name, spent FROM {}.table_budgets ORDER BY table_name",
        "SELECT analyst, tables, epsilon, statement, statement_sha256, fingerprint, chain_seq "
        "FROM {}.charges ORDER BY id"))


@pytest.mark.parametrize("seed", range(6))
def test_a_batch_charged_at_once_matches_the_same_reservations_one_by_one(
        fresh_dsn: str, open_ledger: Callable[..., Ledger], seed: int) -> None:
    """Schema version 8 charges a batch whose reservations all fit with one write per budget
    row; any batch must still charge exactly what its reservations charge one after another.
    Random batches (sizes 1 to 12, random analysts, table sets and amounts, some unknown names)
    run as batches on one ledger schema and one at a time on a twin; the rows each reservation
    gets back, every budget's spending and the charges, hash-chain places included, agree.
    Budgets are sized so that most batches fit whole and later ones start to be refused."""
    chooser = random.Random(seed)
    analysts = {"planner": "6", "researcher": "3", "auditor": "10"}
    batched = open_ledger(schema="batched")
    single = open_ledger(schema="single")
    for ledger in (batched, single):
        ledger.sync_budgets(_shared_population_policies(analysts))
    names = [*analysts, "nobody"]
    tables = ["households", "readings", "tariffs", "pipes", "nowhere"]
    whole = 0
    for b in range(30):
        batch = []
        odd = chooser.random() < 0.3  # a batch with unknown names and empty table lists
        for i in range(chooser.randint(1, 12)):
            text = f"q{b}.{i}"
            batch.append(_Request(
                chooser.choice(names if odd else names[:3]),
                chooser.sample(tables, chooser.randint(0, 3)) if odd
                else chooser.sample(tables[:4], chooser.randint(1, 2)),
                D(chooser.choice(["0.01", "0.05", "0.1", "0.25"])), text, statement_hash(text),
                "f"))
        together = batched._reserve_together(batch)
        alone = [single._reserve_together([request])[0] for request in batch]
        strip = [[row[1:6] for row in rows] for rows in (together, alone)]  # ids, times differ
        assert strip[0] == strip[1], (b, batch)
        whole += all(row[1] is None for row in together)
    assert _books(fresh_dsn, "batched") == _books(fresh_dsn, "single")
    assert 5 <= whole <= 28, f"{whole} of 30 batches fit whole: the test misses a path"


def test_a_batch_of_notes_finds_its_charges_by_index_however_many_there_are(
        fresh_dsn: str, open_ledger: Callable[..., Ledger]) -> None:
    """Noting answers must not cost more as the ledger grows: with thousands of charges (and
    fresh statistics), storing a batch of notes reads the charges table through its primary
    key only. Counted by PostgreSQL itself, in the transaction's own table statistics
    (pg_stat_xact_user_tables, documented with the cumulative statistics system). Version 8's
    ``id IN (SELECT ...)`` was planned as a sequential scan of every charge."""
    ledger = open_ledger()
    ledger.sync_budgets(make_policies({"planner": "1000"}, {"households": None}))
    for b in range(30):
        ledger._reserve_together([
            _Request("planner", ["households"], D("0.001"), f"q{b}.{i}",
                     statement_hash(f"q{b}.{i}"), "f") for i in range(100)])
    with psycopg.connect(fresh_dsn) as conn:
        conn.execute("ANALYZE hushql.charges")
        conn.commit()
        ids = [row[0] for row in conn.execute(
            "SELECT id FROM hushql.charges ORDER BY id DESC LIMIT 3").fetchall()]
        notes = Jsonb([{"analyst": "planner", "question": f"k{i}", "statement": "s",
                        "epsilon": "0.001", "charge_id": i, "answer": {}} for i in ids])
        noted = [row[0] for row in conn.execute(
            "SELECT * FROM hushql.store_answered_batch(%s)", [notes]).fetchall()]
        scans = conn.execute("SELECT seq_scan FROM pg_stat_xact_user_tables "
                             "WHERE schemaname = 'hushql' AND relname = 'charges'").fetchone()
    assert sorted(noted) == sorted(ids)
    assert scans == (0,), f"charges scanned whole {scans} time(s) to note 3 answers"
