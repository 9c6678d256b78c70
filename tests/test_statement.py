"""Parameterised statements: which slots bind late, and that the cached, late-bound plan is
exactly the plan a fresh analysis of the same values makes (proxy.sql.statement)."""

from __future__ import annotations

import datetime as dt
from decimal import Decimal
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from proxy import engine as engine_module
from proxy.engine import Engine
from proxy.errors import HushError
from proxy.policy import load_policies
from proxy.sql import statement as slots
from proxy.sql.statement import BoundStatement
from proxy.wire import statements, types
from tests.policy_fixtures import load_clinic, write_policies

ANALYST = "tester"


def bound(text: str, values: list[Any], oids: tuple[int, ...]) -> BoundStatement:
    tree = statements.single(text).tree
    assert tree is not None
    return statements.bound(text, statements.fold_casts(tree, oids), values, oids)


@pytest.fixture(scope="module")
def policies(tmp_path_factory):
    return load_policies(write_policies(tmp_path_factory.mktemp("policies")))


@pytest.mark.parametrize("text, late", [
    ("SELECT COUNT(*) FROM people WHERE age = $1", {1}),
    ("SELECT COUNT(*) FROM people WHERE $1 < age", {1}),
    ("SELECT ward, AVG(weight) FROM people WHERE age >= $1 AND (admitted < $2 OR NOT weight > $3)"
     " GROUP BY ward", {1, 2}),  # weight is read in SELECT: its slot is planned per value
    ("SELECT COUNT(*) FROM people WHERE age = $1::bigint", {1}),  # a folded cast
    ("SELECT COUNT(*) FROM people WHERE ward = $1", set()),  # text: planned per value
    ("SELECT age, COUNT(*) FROM people WHERE age < $1 GROUP BY age", set()),  # a key's column
    ("SELECT COUNT(*) FROM people WHERE age + 1 > $1", set()),  # arithmetic
    ("SELECT COUNT(*) FROM people WHERE age BETWEEN $1 AND $2", set()),
    ("SELECT COUNT(*) FROM people WHERE age IN ($1, $2)", set()),
    ("SELECT COUNT(*) FROM people WHERE age > $1 AND age < $1 + 5", set()),  # one slot, two uses
    ("SELECT ward, COUNT(*) FROM people GROUP BY ward HAVING COUNT(*) > $1", set()),
    ("SELECT COUNT(*) FROM people WHERE age > 3 LIMIT $1", set()),
])
def test_late_slots_follow_the_rules(policies, text: str, late: set[int]) -> None:
    oids = (types.INT8, types.DATE, types.NUMERIC)[:statements.parameter_count(
        statements.single(text).tree)]
    b = bound(text, [1] * len(oids), oids)
    assert slots.late_slots(b.tree, policies) == frozenset(late)


@pytest.fixture(scope="module")
def engine(module_dsn: str, tmp_path_factory):
    from proxy.backend import Backend
    from proxy.ledger import Ledger

    load_clinic(module_dsn)
    policies = load_policies(write_policies(tmp_path_factory.mktemp("engine-policies")))
    made = Engine(policies, Backend(module_dsn, pool_size=2), Ledger(module_dsn, schema="stmt"))
    yield made
    made.close()


def same_as_fresh(engine: Engine, b: BoundStatement) -> None:
    """The cached path and a fresh analysis of the substituted tree agree exactly: the same
    plan, backend SQL, cells and noise parameters, or the same refusal."""
    try:
        fresh = engine._plan(ANALYST, b.substituted())
    except HushError as error:
        with pytest.raises(HushError) as cached_error:
            engine.prepare(ANALYST, b)
        assert cached_error.value.sqlstate == error.sqlstate
        return
    cached = engine.prepare(ANALYST, b)
    assert cached.rewritten.sql == fresh.rewritten.sql
    assert engine_module._same_plan(cached, fresh)


INTS = st.one_of(st.integers(-200, 200), st.integers(-10**35, 10**35))
DECIMALS = st.decimals(min_value=Decimal("-1e32"), max_value=Decimal("1e32"), allow_nan=False,
                       allow_infinity=False)
DATES = st.dates(min_value=dt.date(1, 1, 1), max_value=dt.date(9999, 12, 31))

CASES = [
    ("SELECT COUNT(*) FROM people WHERE age = $1", (types.INT8,), st.tuples(INTS)),
    ("SELECT ward, COUNT(*), AVG(weight) FROM people WHERE age >= $1 AND admitted < $2 "
     "GROUP BY ward", (types.INT8, types.DATE), st.tuples(INTS, DATES)),
    ("SELECT COUNT(*) FROM people WHERE weight > $1 OR $2 <> age",
     (types.NUMERIC, types.INT8), st.tuples(DECIMALS, INTS)),
    ("SELECT ward, SUM(minutes) FROM visits WHERE fee <= $1 AND visited > $2 GROUP BY ward",
     (types.NUMERIC, types.DATE), st.tuples(DECIMALS, DATES)),
    # planned per value (a key's column): cached by value, still the fresh plan
    ("SELECT age, COUNT(*) FROM people WHERE age BETWEEN $1 AND $2 GROUP BY age",
     (types.INT8, types.INT8), st.tuples(st.integers(-5, 130), st.integers(-5, 130))),
]


@pytest.mark.parametrize("text, oids, values", CASES, ids=[c[0][:50] for c in CASES])
@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_cached_plans_equal_fresh_analysis(engine, text, oids, values, data) -> None:
    chosen = data.draw(values)
    b = bound(text, list(chosen), oids)
    same_as_fresh(engine, b)
    same_as_fresh(engine, b)  # a second time: from the cache


def test_a_late_statement_is_planned_once_per_class(engine) -> None:
    text = "SELECT COUNT(*) FROM people WHERE age = $1 AND admitted >= $2"
    oids = (types.INT8, types.DATE)
    before = len(engine._cache)
    for k in range(40):
        engine.prepare(ANALYST, bound(text, [k, dt.date(2026, 1, 1) + dt.timedelta(days=k)], oids))
    engine.prepare(ANALYST, bound(text, [-3, dt.date(2026, 1, 1)], oids))  # another sign
    assert engine._late[(ANALYST, text, oids)] == frozenset({1, 2})
    assert len(engine._cache) - before == 2
    planned = engine.prepare(ANALYST, bound(text, [7, dt.date(2026, 2, 3)], oids))
    assert "7" in planned.rewritten.sql and "2026-02-03" in planned.rewritten.sql


def test_a_wrong_late_slot_is_caught_by_the_check_against_fresh_analysis(engine, monkeypatch
                                                                          ) -> None:
    """The companion: claiming a key column's slot is late would change the cells (WHERE
    narrows the key's domain); the first plan's check finds it and plans per value."""
    text = "SELECT age, COUNT(*) FROM people WHERE age < $1 GROUP BY age"
    monkeypatch.setattr(slots, "late_slots", lambda tree, policies, narrowed: frozenset({1}))
    b = bound(text, [50], (types.INT8,))
    planned = engine.prepare(ANALYST, b)
    assert engine._late[(ANALYST, text, (types.INT8,))] == frozenset()  # turned off
    assert engine_module._same_plan(planned, engine._plan(ANALYST, b.substituted()))
    assert len(planned.cells) < len(engine.prepare(ANALYST, bound(text, [90], (types.INT8,))).cells)


def test_late_values_are_checked_as_analysis_checks_them(engine) -> None:
    text = "SELECT COUNT(*) FROM people WHERE age = $1"
    engine.prepare(ANALYST, bound(text, [3], (types.INT8,)))
    for value, oid, sqlstate in [(10**31, types.INT8, "54000"),  # beyond numeric_digits
                                 (Decimal("1E-31"), types.NUMERIC, "54000")]:  # numeric_scale
        b = bound(text, [value], (oid,))
        with pytest.raises(HushError) as caught:
            engine.prepare(ANALYST, b)
        assert caught.value.sqlstate == sqlstate
        same_as_fresh(engine, b)
