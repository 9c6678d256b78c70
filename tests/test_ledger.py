"""Tests for proxy.ledger against a real PostgreSQL (each test in a database of its own).

What must hold: the schema is created once and versioned even when proxies start together;
epsilon sums exactly; an exhausted budget or cap refuses with SQLSTATE 53400 and charges
nothing; concurrent reservations (threads, and two ledgers with separate pools as two proxy
processes) never overspend; a lock on one analyst's row does not delay another analyst.
"""

from __future__ import annotations

import hashlib

import threading
import time
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from decimal import Decimal
from types import SimpleNamespace
from typing import Any

import psycopg
import pytest

from proxy.errors import (
    BUDGET_EXHAUSTED,
    INSUFFICIENT_PRIVILEGE,
    INTERNAL_ERROR,
    INVALID_PARAMETER_VALUE,
    UNDEFINED_TABLE,
    HushError,
)
from proxy import ledger as ledger_module
from proxy.ledger import SCHEMA_VERSION, Ledger, LedgerError
from proxy.policy import (
    AccessPolicy,
    AnalystPolicy,
    ColumnPolicy,
    Individual,
    Policies,
    TableBudget,
    TablePolicy,
)

D = Decimal


def make_policies(analysts: dict[str, str], tables: dict[str, str | None]) -> Policies:
    """Policies with the given analyst budgets and table caps (None: no cap), as decimals."""
    access = AccessPolicy(analysts={
        name: AnalystPolicy(password="SCRAM-SHA-256$test", budget=D(budget),
                            tables=sorted(tables))
        for name, budget in analysts.items()})
    table_policies = {
        name: TablePolicy(table=name, source=f"public.{name}",
                          columns={"flag": ColumnPolicy(kind="boolean")},
                          budget=TableBudget(cap=D(cap)) if cap is not None else None)
        for name, cap in tables.items()}
    return Policies(access=access, tables=table_policies)


@pytest.fixture
def open_ledger(fresh_dsn: str) -> Iterator[Callable[..., Ledger]]:
    """A factory of Ledgers on the test's database, all closed when the test ends."""
    made: list[Ledger] = []

    def factory(**options: Any) -> Ledger:
        ledger = Ledger(fresh_dsn, **options)
        made.append(ledger)
        return ledger

    yield factory
    for ledger in made:
        ledger.close()


def query(dsn: str, text: str, params: list[Any] | None = None) -> list[tuple[Any, ...]]:
    """Rows of one statement on a connection of its own (sees only committed data)."""
    with psycopg.connect(dsn, autocommit=True) as conn:
        cursor = conn.execute(text, params)
        return cursor.fetchall() if cursor.description is not None else []


def charge_count(dsn: str, schema: str = "hushql") -> int:
    return query(dsn, f"SELECT count(*) FROM {schema}.charges")[0][0]


# --- schema -------------------------------------------------------------------------------------

def test_schema_is_created_once_and_versioned(fresh_dsn: str,
                                              open_ledger: Callable[..., Ledger]) -> None:
    open_ledger()
    open_ledger()  # a second start finds the schema current and changes nothing
    versions = query(fresh_dsn, "SELECT version FROM hushql.schema_version ORDER BY version")
    assert versions == [(v,) for v in range(1, SCHEMA_VERSION + 1)]
    tables = {row[0] for row in query(
        fresh_dsn, "SELECT table_name FROM information_schema.tables "
                   "WHERE table_schema = 'hushql'")}
    assert {"schema_version", "analyst_budgets", "table_budgets", "charges"} <= tables


def test_proxies_starting_together_do_not_race(fresh_dsn: str) -> None:
    starters = 6
    barrier = threading.Barrier(starters)

    def start(_: int) -> Ledger:
        barrier.wait()
        return Ledger(fresh_dsn, pool_size=1)

    with ThreadPoolExecutor(starters) as pool:
        ledgers = list(pool.map(start, range(starters)))  # re-raises any failure
    for ledger in ledgers:
        ledger.close()
    assert query(fresh_dsn, "SELECT count(*) FROM hushql.schema_version")[0][0] == SCHEMA_VERSION


def test_workers_starting_together_import_one_policy_without_racing(fresh_dsn: str) -> None:
    """``serve --workers N`` starts N engines at once, each syncing the same policy into a
    ledger that has none of its rows yet: every sync succeeds (without the schema's advisory
    lock, the later inserts failed on the budget tables' keys and killed the worker), and the
    budgets are imported once."""
    starters = 6
    policies = make_policies({"planner": "1.0", "researcher": "2.0"},
                             {"households": "3.0", "readings": None})
    Ledger(fresh_dsn, pool_size=1).close()  # the schema exists; its budget rows do not
    for round_ in range(3):
        ledgers = [Ledger(fresh_dsn, schema=f"round{round_}", pool_size=1)
                   for _ in range(starters)]
        barrier = threading.Barrier(starters)

        def sync(ledger: Ledger) -> list[str]:
            barrier.wait()
            return ledger.sync_budgets(policies)

        try:
            with ThreadPoolExecutor(starters) as pool:
                list(pool.map(sync, ledgers))  # re-raises any failure
        finally:
            for ledger in ledgers:
                ledger.close()
        assert query(fresh_dsn, f"SELECT analyst, budget FROM round{round_}.analyst_budgets "
                                "ORDER BY analyst") == [("planner", D("1.0")),
                                                         ("researcher", D("2.0"))]
        assert query(fresh_dsn, f"SELECT count(*) FROM round{round_}.budget_events "
                                "WHERE kind = 'import'") == [(4,)]


def test_schema_name_is_configurable_and_checked(fresh_dsn: str,
                                                 open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger(schema="books_b")
    ledger.sync_budgets(make_policies({"planner": "1.0"}, {}))
    ledger.reserve("planner", [], D("0.5"), "SELECT 1", "f")
    assert charge_count(fresh_dsn, "books_b") == 1
    assert query(fresh_dsn, "SELECT to_regnamespace('hushql') IS NULL")[0][0]
    for bad in ("Books", "a-b", "x; DROP TABLE y", ""):
        with pytest.raises(LedgerError):
            Ledger(fresh_dsn, schema=bad)


def test_a_schema_newer_than_the_program_is_refused(fresh_dsn: str,
                                                    open_ledger: Callable[..., Ledger]) -> None:
    open_ledger()
    query(fresh_dsn, "INSERT INTO hushql.schema_version (version, description) "
                     "VALUES (%s, 'from the future')", [SCHEMA_VERSION + 1])
    with pytest.raises(LedgerError, match="newer"):
        Ledger(fresh_dsn)


def test_commits_are_synchronous_even_when_the_database_default_is_not(
        fresh_dsn: str, open_ledger: Callable[..., Ledger]) -> None:
    dbname = psycopg.conninfo.conninfo_to_dict(fresh_dsn)["dbname"]
    query(fresh_dsn, f'ALTER DATABASE "{dbname}" SET synchronous_commit = off')
    ledger = open_ledger(pool_size=1)
    with ledger._pool.connection() as conn:  # noqa: SLF001 - the setting is the contract
        assert conn.execute("SHOW synchronous_commit").fetchone() == ("on",)
    ledger.sync_budgets(make_policies({"planner": "1.0"}, {}))
    ledger.finish(ledger.reserve("planner", [], D("0.1"), "SELECT 1", "f").charge_id, "answered")
    with ledger._pool.connection() as conn:  # noqa: SLF001
        # finish's asynchronous commit is local to its own transaction
        assert conn.execute("SHOW synchronous_commit").fetchone() == ("on",)
    charge, left, _ = ledger.reserve("planner", [], D("0.1"), "SELECT 1", "f")
    # Returned means committed: another session sees the charge and the spending.
    assert query(fresh_dsn, "SELECT outcome FROM hushql.charges WHERE id = %s",
                 [charge]) == [("reserved",)]
    assert left == D("0.8")
    assert query(fresh_dsn, "SELECT spent FROM hushql.analyst_budgets") == [(D("0.2"),)]


# --- budgets and arithmetic ----------------------------------------------------------------------

def test_sync_sets_budgets_and_keeps_spending(fresh_dsn: str,
                                              open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger()
    ledger.sync_budgets(make_policies({"planner": "3.0", "researcher": "2"},
                                      {"readings": "20.0", "households": None}))
    ledger.reserve("planner", ["readings"], D("0.25"), "SELECT 1", "f")
    ledger.sync_budgets(make_policies({"planner": "5.0", "researcher": "2"},
                                      {"readings": "10.0", "households": "4"}))
    assert ledger.spent("planner") == D("0.25")
    assert ledger.remaining("planner") == D("4.75")
    assert ledger.remaining("researcher") == D("2")
    assert ledger.table_remaining("readings") == D("9.75")
    assert ledger.table_remaining("households") == D("4")
    ledger.sync_budgets(make_policies({"planner": "0.1"}, {"readings": None}))
    assert ledger.remaining("planner") == 0  # a budget lowered below spending leaves nothing
    assert ledger.spent("planner") == D("0.25")
    assert ledger.table_remaining("readings") is None  # cap removed
    assert ledger.remaining("researcher") == D("2")  # rows not in the policy are kept


def test_tenths_add_up_exactly(open_ledger: Callable[..., Ledger]) -> None:
    # In binary floating point thirty 0.1s sum to 3.0000000000000013 > 3.0, which would refuse
    # the thirtieth query; exact decimals must allow exactly thirty.
    assert sum([0.1] * 30) > 3.0
    ledger = open_ledger()
    ledger.sync_budgets(make_policies({"planner": "3.0"}, {"readings": "3.0"}))
    for _ in range(30):
        ledger.finish(ledger.reserve("planner", ["readings"], D("0.1"), "SELECT 1", "f").charge_id,
                      "answered")
    assert ledger.spent("planner") == D("3.0")
    assert str(ledger.spent("planner")) == "3.0"
    assert ledger.remaining("planner") == 0
    assert ledger.table_remaining("readings") == 0
    with pytest.raises(HushError) as caught:
        ledger.reserve("planner", ["readings"], D("0.1"), "SELECT 1", "f")
    assert caught.value.sqlstate == BUDGET_EXHAUSTED


def test_epsilon_must_be_a_positive_finite_decimal(open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger()
    ledger.sync_budgets(make_policies({"planner": "3.0"}, {}))
    for wrong_type in (0.1, 1, "0.1"):
        with pytest.raises(TypeError):
            ledger.reserve("planner", [], wrong_type, "SELECT 1", "f")  # type: ignore[arg-type]
    for bad in ("0", "-0.1", "NaN", "Infinity"):
        with pytest.raises(HushError) as caught:
            ledger.reserve("planner", [], D(bad), "SELECT 1", "f")
        assert caught.value.sqlstate == INVALID_PARAMETER_VALUE
    assert ledger.spent("planner") == 0
    floating = SimpleNamespace(analysts={"planner": SimpleNamespace(budget=3.0)}, tables={})
    with pytest.raises(TypeError):
        ledger.sync_budgets(floating)  # type: ignore[arg-type]


def test_exhausted_budget_says_what_is_left_and_charges_nothing(
        fresh_dsn: str, open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger()
    ledger.sync_budgets(make_policies({"planner": "3.0"}, {"readings": None}))
    ledger.reserve("planner", ["readings"], D("2.95"), "SELECT 1", "f")
    with pytest.raises(HushError) as caught:
        ledger.reserve("planner", ["readings"], D("0.1"), "SELECT 2", "g")
    error = caught.value
    assert error.sqlstate == BUDGET_EXHAUSTED
    assert error.message == ("privacy budget exhausted: 0.05 of 3.0 left for analyst planner, "
                             "this query needs 0.1")
    assert error.hint == "lower hushql.epsilon or ask an administrator for more budget"
    assert charge_count(fresh_dsn) == 1
    assert ledger.spent("planner") == D("2.95")
    assert query(fresh_dsn, "SELECT spent FROM hushql.table_budgets") == [(D("2.95"),)]
    # What is left can still be spent exactly.
    ledger.reserve("planner", ["readings"], D("0.05"), "SELECT 3", "h")
    assert ledger.remaining("planner") == 0


def test_unknown_analyst_and_unknown_table_are_refused(
        fresh_dsn: str, open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger()
    ledger.sync_budgets(make_policies({"planner": "3.0"}, {"readings": None}))
    with pytest.raises(HushError) as caught:
        ledger.reserve("intruder", ["readings"], D("0.1"), "SELECT 1", "f")
    assert caught.value.sqlstate == INSUFFICIENT_PRIVILEGE
    for ask in (ledger.remaining, ledger.spent):
        with pytest.raises(HushError) as caught:
            ask("intruder")
        assert caught.value.sqlstate == INSUFFICIENT_PRIVILEGE
    with pytest.raises(HushError) as caught:
        ledger.reserve("planner", ["readings", "secrets"], D("0.1"), "SELECT 1", "f")
    assert caught.value.sqlstate == UNDEFINED_TABLE
    assert "secrets" in caught.value.message
    with pytest.raises(HushError) as caught:
        ledger.table_remaining("secrets")
    assert caught.value.sqlstate == UNDEFINED_TABLE
    assert charge_count(fresh_dsn) == 0
    assert ledger.spent("planner") == 0
    assert query(fresh_dsn, "SELECT spent FROM hushql.table_budgets") == [(D(0),)]


def test_tables_of_one_population_share_one_cap(fresh_dsn: str,
                                               open_ledger: Callable[..., Ledger]) -> None:
    """households and readings protect the same households: spending on either adds up against
    one cap, the smaller the two tables declare."""
    policies = make_policies({"planner": "5.0"}, {"readings": "1.0", "households": "2.0",
                                                  "pipes": "1.0"})
    shared = {name: table.model_copy(update={"individual": Individual(
        column="flag", population="households", most_rows=1)})
        for name, table in policies.tables.items() if name != "pipes"}
    policies = Policies(access=policies.access, tables={**policies.tables, **shared})
    ledger = open_ledger()
    ledger.sync_budgets(policies)
    ledger.reserve("planner", ["households"], D("0.6"), "SELECT 1", "f")
    assert ledger.table_remaining("readings") == D("0.4")  # the population's cap: min(1, 2)
    with pytest.raises(HushError) as caught:
        ledger.reserve("planner", ["readings"], D("0.6"), "SELECT 2", "f")
    assert caught.value.sqlstate == BUDGET_EXHAUSTED
    assert caught.value.message == (
        "population budget exhausted: 0.4 of 1.0 left for the individuals of population "
        "households (all analysts, all its tables together), this query needs 0.6")
    ledger.reserve("planner", ["pipes"], D("0.6"), "SELECT 3", "f")  # another population
    ledger.reserve("planner", ["readings", "households"], D("0.4"), "SELECT 4", "f")
    assert ledger.table_remaining("households") == 0
    # Each table's own spending is kept for the books; the population holds the sum.
    assert dict(query(fresh_dsn, "SELECT table_name, spent FROM hushql.table_budgets")) == {
        "households": D("1.0"), "readings": D("0.4"), "pipes": D("0.6")}
    assert dict(query(fresh_dsn, "SELECT population, spent FROM hushql.population_budgets")) == {
        "households": D("1.0"), "pipes": D("0.6")}


def test_table_cap_holds_across_analysts(fresh_dsn: str,
                                         open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger()
    ledger.sync_budgets(make_policies({"planner": "1.0", "researcher": "1.0"},
                                      {"readings": "0.3", "households": None}))
    ledger.reserve("planner", ["readings", "households"], D("0.2"), "SELECT 1", "f")
    ledger.reserve("researcher", ["readings"], D("0.1"), "SELECT 2", "f")
    with pytest.raises(HushError) as caught:
        ledger.reserve("researcher", ["households", "readings"], D("0.1"), "SELECT 3", "f")
    error = caught.value
    assert error.sqlstate == BUDGET_EXHAUSTED
    assert error.message == ("table budget exhausted: 0.0 of 0.3 left for table readings "
                             "(all analysts together), this query needs 0.1")
    assert "cap" in (error.hint or "")
    # Nothing of the refused reservation remains: not the analyst's, not either table's.
    assert ledger.spent("researcher") == D("0.1")
    assert ledger.table_remaining("readings") == 0
    assert ledger.table_remaining("households") is None
    assert dict(query(fresh_dsn, "SELECT table_name, spent FROM hushql.table_budgets")) == {
        "readings": D("0.3"), "households": D("0.2")}
    assert charge_count(fresh_dsn) == 2
    # Other tables remain open to the same analyst.
    ledger.reserve("researcher", ["households"], D("0.5"), "SELECT 4", "f")


def test_charge_rows_and_outcomes(fresh_dsn: str, open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger()
    ledger.sync_budgets(make_policies({"planner": "3.0"}, {"readings": None, "households": None}))
    statement = "SELECT district, COUNT(*) FROM households GROUP BY district"
    ids = [ledger.reserve("planner", ["readings", "households", "readings"], D("0.5"),
                          statement, "fp-1").charge_id for _ in range(3)]
    assert ids == sorted(ids) and len(set(ids)) == 3
    row = query(fresh_dsn, "SELECT analyst, tables, epsilon, statement, fingerprint, outcome, "
                           "finished_at FROM hushql.charges WHERE id = %s", [ids[0]])[0]
    assert row == ("planner", ["households", "readings"], D("0.5"), statement, "fp-1",
                   "reserved", None)
    ledger.finish(ids[0], "answered")
    ledger.finish(ids[1], "failed")
    ledger.finish(ids[2], "cancelled")
    outcomes = query(fresh_dsn, "SELECT outcome, finished_at >= reserved_at FROM hushql.charges "
                                "ORDER BY id")
    assert outcomes == [("answered", True), ("failed", True), ("cancelled", True)]
    assert ledger.spent("planner") == D("1.5")  # failed and cancelled charges stand
    with pytest.raises(ValueError):
        ledger.finish(ids[0], "failed")  # already finished
    with pytest.raises(ValueError):
        ledger.finish(ids[-1] + 1000, "answered")  # no such charge
    with pytest.raises(ValueError):
        ledger.finish(ids[0], "refunded")
    assert ledger.spent("planner") == D("1.5")


def test_database_refuses_overspending_written_by_hand(
        fresh_dsn: str, open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger()
    ledger.sync_budgets(make_policies({"planner": "1.0"}, {"readings": "2.0"}))
    with pytest.raises(psycopg.errors.CheckViolation):
        query(fresh_dsn, "UPDATE hushql.analyst_budgets SET spent = 1.01")
    with pytest.raises(psycopg.errors.CheckViolation):
        query(fresh_dsn, "UPDATE hushql.table_budgets SET spent = 2.5")
    query(fresh_dsn, "UPDATE hushql.analyst_budgets SET spent = 1.0")  # up to the limit
    query(fresh_dsn, "UPDATE hushql.analyst_budgets SET budget = 0.5")  # lowering
    assert ledger.remaining("planner") == 0


# --- concurrency ---------------------------------------------------------------------------------

def race(ledgers: list[Ledger], attempts: int, analyst: Callable[[int], str],
         tables: list[str], epsilon: Decimal) -> tuple[int, list[str]]:
    """``attempts`` threads released together, thread i reserving on ledgers[i % len]. Returns
    (successes, SQLSTATEs of the refusals); any other exception fails the test."""
    barrier = threading.Barrier(attempts)

    def attempt(i: int) -> str | None:
        barrier.wait()
        try:
            ledger = ledgers[i % len(ledgers)]
            ledger.finish(ledger.reserve(analyst(i), tables, epsilon, f"SELECT {i}", "f").charge_id,
                          "answered")
            return None
        except HushError as error:
            return error.sqlstate

    with ThreadPoolExecutor(attempts) as pool:
        results = list(pool.map(attempt, range(attempts)))
    refusals = [r for r in results if r is not None]
    return attempts - len(refusals), refusals


def test_thirty_two_threads_get_exactly_ten_answers(fresh_dsn: str,
                                                    open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger(pool_size=8)
    ledger.sync_budgets(make_policies({"planner": "1.0"}, {"readings": None}))
    successes, refusals = race([ledger], 32, lambda i: "planner", ["readings"], D("0.1"))
    assert successes == 10
    assert refusals == [BUDGET_EXHAUSTED] * 22
    assert ledger.spent("planner") == D("1.0")
    assert charge_count(fresh_dsn) == 10


def test_two_proxies_sharing_a_ledger_never_overspend(fresh_dsn: str,
                                                      open_ledger: Callable[..., Ledger]) -> None:
    first, second = open_ledger(pool_size=4), open_ledger(pool_size=4)
    first.sync_budgets(make_policies({"planner": "1.0", "researcher": "5.0"},
                                     {"readings": "1.5"}))
    successes, refusals = race([first, second], 32, lambda i: "planner", ["readings"], D("0.1"))
    assert (successes, refusals) == (10, [BUDGET_EXHAUSTED] * 22)
    # A table cap shared by two analysts and two proxies: 0.5 left of 1.5, so five more.
    successes, refusals = race([first, second], 32, lambda i: "researcher", ["readings"],
                               D("0.1"))
    assert (successes, refusals) == (5, [BUDGET_EXHAUSTED] * 27)
    assert first.spent("planner") == D("1.0")
    assert second.spent("researcher") == D("0.5")
    assert first.table_remaining("readings") == 0
    assert charge_count(fresh_dsn) == 15


def test_many_analysts_sharing_a_capped_table(fresh_dsn: str,
                                              open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger(pool_size=8)
    analysts = {f"analyst_{n}": "10" for n in range(4)}
    ledger.sync_budgets(make_policies(analysts, {"readings": "1.0", "households": None}))
    # Tables named in varying order: locks are still taken in one order, so no deadlock (40P01).
    orders = [["readings", "households"], ["households", "readings"]]
    barrier = threading.Barrier(32)
    outcomes: list[str | None] = []

    def attempt(i: int) -> None:
        barrier.wait()
        try:
            ledger.reserve(f"analyst_{i % 4}", orders[i % 2], D("0.1"), "SELECT 1", "f")
            outcomes.append(None)
        except HushError as error:
            outcomes.append(error.sqlstate)

    with ThreadPoolExecutor(32) as pool:
        list(pool.map(attempt, range(32)))
    assert outcomes.count(None) == 10
    assert outcomes.count(BUDGET_EXHAUSTED) == 22
    assert ledger.table_remaining("readings") == 0
    assert charge_count(fresh_dsn) == 10


def test_policy_sync_during_reservations_neither_deadlocks_nor_loses_spending(
        fresh_dsn: str, open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger(pool_size=6)
    budgets = [make_policies({"planner": budget, "researcher": budget},
                             {"readings": budget, "households": None})
               for budget in ("100", "200")]
    ledger.sync_budgets(budgets[0])
    stop = threading.Event()

    def keep_syncing() -> int:
        rounds = 0
        while not stop.is_set():
            ledger.sync_budgets(budgets[rounds % 2])
            rounds += 1
        return rounds

    def reserve_many(i: int) -> None:
        for _ in range(25):
            ledger.reserve(("planner", "researcher")[i % 2], [["readings", "households"],
                           ["households", "readings"]][i % 2], D("0.01"), "SELECT 1", "f")

    with ThreadPoolExecutor(9) as pool:
        syncing = pool.submit(keep_syncing)
        list(pool.map(reserve_many, range(8)))  # a deadlock (40P01) would raise here
        stop.set()
        assert syncing.result() > 0
    assert ledger.spent("planner") + ledger.spent("researcher") == D("2.00")
    assert query(fresh_dsn, "SELECT spent FROM hushql.table_budgets WHERE "
                            "table_name = 'readings'") == [(D("2.00"),)]
    assert charge_count(fresh_dsn) == 200


def test_a_held_analyst_row_does_not_delay_another_analyst(
        fresh_dsn: str, open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger(pool_size=4)
    ledger.sync_budgets(make_policies({"planner": "1.0", "researcher": "1.0"},
                                      {"readings": None, "households": None}))
    with psycopg.connect(fresh_dsn) as holder:  # a transaction that sits on planner's row
        holder.execute("SELECT 1 FROM hushql.analyst_budgets WHERE analyst = 'planner' "
                       "FOR UPDATE")
        with ThreadPoolExecutor(2) as pool:
            blocked = pool.submit(ledger.reserve, "planner", ["readings"], D("0.1"), "S", "f")
            other = pool.submit(ledger.reserve, "researcher", ["households"], D("0.1"), "S", "f")
            other.result(timeout=5)  # not delayed by the held row
            time.sleep(0.5)
            assert not blocked.done()  # control: the same analyst does wait for the row
            holder.rollback()
            blocked.result(timeout=5)
    assert ledger.spent("planner") == D("0.1")
    assert ledger.spent("researcher") == D("0.1")


def test_a_row_held_too_long_fails_closed(fresh_dsn: str,
                                          open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger(lock_timeout=0.2)
    ledger.sync_budgets(make_policies({"planner": "1.0"}, {}))
    with psycopg.connect(fresh_dsn) as holder:
        holder.execute("SELECT 1 FROM hushql.analyst_budgets FOR UPDATE")
        with pytest.raises(HushError) as caught:
            ledger.reserve("planner", [], D("0.1"), "SELECT 1", "f")
        holder.rollback()
    assert caught.value.sqlstate == INTERNAL_ERROR
    assert "nothing was run" in caught.value.message
    assert charge_count(fresh_dsn) == 0
    ledger.reserve("planner", [], D("0.1"), "SELECT 1", "f")  # the pool is still usable
    assert ledger.spent("planner") == D("0.1")


# --- statement excerpt and hash -----------------------------------------------------------------

def test_a_charge_keeps_an_excerpt_and_the_hash_of_the_whole_statement(
        fresh_dsn: str, open_ledger: Callable[..., Ledger]) -> None:
    ledger = open_ledger()
    ledger.sync_budgets(make_policies({"planner": "3.0"}, {"households": None}))
    long = "SELECT COUNT(*) FROM households WHERE district IN (" + ", ".join(
        f"'district {i}'" for i in range(2000)) + ")"
    for statement in (long, "SELECT 1"):
        ledger.reserve("planner", ["households"], D("0.1"), statement, "fp")
    rows = query(fresh_dsn, "SELECT statement, statement_sha256 FROM hushql.charges ORDER BY id")
    assert rows[0] == (long[:ledger_module.STATEMENT_EXCERPT],
                       hashlib.sha256(long.encode()).hexdigest())
    assert rows[1] == ("SELECT 1", hashlib.sha256(b"SELECT 1").hexdigest())


def test_the_hash_migration_fills_in_rows_written_before_it(
        fresh_dsn: str, open_ledger: Callable[..., Ledger], monkeypatch) -> None:
    version_one = ledger_module._MIGRATIONS[:1]
    monkeypatch.setattr(ledger_module, "_MIGRATIONS", version_one)
    monkeypatch.setattr(ledger_module, "SCHEMA_VERSION", 1)
    old = open_ledger()
    with old._connection() as conn:  # version 1's budget rows, as that version wrote them
        conn.execute("INSERT INTO hushql.analyst_budgets (analyst, budget) VALUES ('planner', 3.0)")
        conn.execute("INSERT INTO hushql.table_budgets (table_name, cap) VALUES ('households', NULL)")
    old._sql.reserve = old._sql.reserve.replace("reserve_one(%s, %s::text[], %s, %s, %s, %s)",
                                                "reserve_charge(%s, %s::text[], %s, %s, %s)")
    with old._connection() as conn:
        conn.execute(old._sql.reserve, ["planner", ["households"], D("0.1"), "SELECT 2", "fp"])
    monkeypatch.undo()
    open_ledger()  # upgrades to the current version
    assert query(fresh_dsn, "SELECT statement, statement_sha256 FROM hushql.charges") == [
        ("SELECT 2", hashlib.sha256(b"SELECT 2").hexdigest())]
    assert query(fresh_dsn, "SELECT max(version) FROM hushql.schema_version") == [(SCHEMA_VERSION,)]
