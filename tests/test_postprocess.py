"""Post-processing on noisy rows: HAVING with three-valued logic, stable ORDER BY, OFFSET/LIMIT,
hidden outputs dropped. No database: plans come from analysis over a small policy."""

from __future__ import annotations

import datetime as dt
import functools
from decimal import Decimal
from fractions import Fraction

import pytest
import sqlglot.expressions as exp
from hypothesis import given, settings
from hypothesis import strategies as st

from proxy.policy import (AccessPolicy, AnalystPolicy, ColumnPolicy, Policies, TablePolicy)
from proxy.sql.analyse import analyse
from proxy.sql.plan import Measure, OrderItem, Output, Plan, output_ref
from proxy.sql.postprocess import compile_condition, postprocess

TABLE = TablePolicy(
    table="households", source="utility.households",
    columns={
        "district": ColumnPolicy(kind="category", values=["Northbank", "Old Mill", "Harbourside"]),
        "occupants": ColumnPolicy(kind="integer", range=[1, 8]),
        "has_garden": ColumnPolicy(kind="boolean"),
        "connected_on": ColumnPolicy(kind="date", range=["2024-01-01", "2024-12-31"], bucket="quarter"),
    })
POLICIES = Policies(
    access=AccessPolicy(analysts={"planner": AnalystPolicy(
        password="SCRAM-SHA-256$4096:c2FsdA==$c3RvcmVk:c2VydmVy", budget=Decimal(1),
        tables=["households"])}),
    tables={"households": TABLE})


def plan_of(sql: str) -> Plan:
    return analyse(sql, POLICIES, "planner")


def keep(having_sql: str, rows: list[list], select: str = "district, COUNT(*), SUM(occupants)") -> list[tuple]:
    plan = plan_of(f"SELECT {select} FROM households GROUP BY district HAVING {having_sql}")
    return postprocess(plan, rows)


ROWS = [["Northbank", 12, 30], ["Old Mill", None, 5], ["Harbourside", 3, None]]


def test_no_post_processing_keeps_domain_order():
    plan = plan_of("SELECT district, COUNT(*) FROM households GROUP BY district")
    rows = [["Northbank", 5], ["Old Mill", 9], ["Harbourside", 1]]
    assert postprocess(plan, rows) == [("Northbank", 5), ("Old Mill", 9), ("Harbourside", 1)]


@pytest.mark.parametrize("condition,expected", [
    ("COUNT(*) > 5", ["Northbank"]),
    ("COUNT(*) <= 5", ["Harbourside"]),
    ("NOT COUNT(*) > 5", ["Harbourside"]),                 # NOT NULL is NULL: Old Mill dropped
    ("COUNT(*) > 5 OR SUM(occupants) > 1", ["Northbank", "Old Mill"]),
    ("COUNT(*) > 5 AND SUM(occupants) > 1", ["Northbank"]),
    ("COUNT(*) IS NULL", ["Old Mill"]),
    ("COUNT(*) IS NOT NULL", ["Northbank", "Harbourside"]),
    ("COUNT(*) BETWEEN 3 AND 12", ["Northbank", "Harbourside"]),
    ("COUNT(*) IN (3, 4)", ["Harbourside"]),
    ("COUNT(*) IN (4, NULL)", []),                        # no match and a NULL candidate: NULL
    ("NOT COUNT(*) IN (4, NULL)", []),
    ("NOT COUNT(*) IN (4, 5)", ["Northbank", "Harbourside"]),
    ("COUNT(*) * 2 - 1 > 5", ["Northbank"]),
    ("-COUNT(*) < -10", ["Northbank"]),
    ("COUNT(*) + SUM(occupants) > 0", ["Northbank"]),     # NULL + x is NULL
    ("district = 'Old Mill' OR district = 'Harbourside'", ["Old Mill", "Harbourside"]),
    ("district <> 'Northbank' AND COUNT(*) > 0", ["Harbourside"]),
    ("(COUNT(*) > 5) IS TRUE", ["Northbank"]),
    ("(COUNT(*) > 5) IS NOT TRUE", ["Old Mill", "Harbourside"]),
    ("(COUNT(*) > 5) IS FALSE", ["Harbourside"]),
    ("NULL", []),
    ("TRUE", ["Northbank", "Old Mill", "Harbourside"]),
    ("COUNT(*) > 2.5", ["Northbank", "Harbourside"]),
])
def test_having_three_valued_logic(condition, expected):
    assert [row[0] for row in keep(condition, ROWS)] == expected


def test_having_on_mixed_numeric_types():
    rows = [["Northbank", 4, Decimal("10.5")], ["Old Mill", 7, 2.25], ["Harbourside", 1, Fraction(7, 2)]]
    result = keep("SUM(occupants) * 2 > COUNT(*) + 1.5", rows)
    assert [r[0] for r in result] == ["Northbank", "Harbourside"]  # 21 > 5.5, 4.5 > 8.5 no, 7 > 2.5


def test_having_with_nan_and_infinity_never_raises():
    rows = [["Northbank", 1, float("nan")], ["Old Mill", 2, float("inf")], ["Harbourside", 3, -float("inf")]]
    result = keep("SUM(occupants) > 0 OR SUM(occupants) - SUM(occupants) = 0", rows)
    assert [r[0] for r in result] == ["Old Mill"]


def test_having_on_date_keys_accepts_dates_and_datetimes():
    plan = plan_of("SELECT connected_on, COUNT(*) FROM households GROUP BY connected_on "
                   "HAVING connected_on >= '2024-07-01'")
    dates = [[dt.date(2024, 1, 1), 1], [dt.date(2024, 4, 1), 2], [dt.date(2024, 7, 1), 3],
             [dt.date(2024, 10, 1), 4]]
    assert [r[1] for r in postprocess(plan, dates)] == [3, 4]
    stamps = [[dt.datetime(d.year, d.month, d.day, tzinfo=dt.timezone.utc), n] for d, n in dates]
    assert [r[1] for r in postprocess(plan, stamps)] == [3, 4]


def test_having_on_boolean_key():
    plan = plan_of("SELECT COUNT(*) FROM households GROUP BY has_garden HAVING has_garden")
    assert postprocess(plan, [[5, False], [7, True]]) == [(7,)]


def test_hidden_outputs_are_dropped_after_use():
    plan = plan_of("SELECT district FROM households GROUP BY district, has_garden "
                   "HAVING COUNT(*) > 1 ORDER BY has_garden DESC, SUM(occupants)")
    assert [o.visible for o in plan.outputs] == [True, False, False, False]
    rows = [["Northbank", 5, False, 9], ["Northbank", 0, True, 1], ["Old Mill", 3, True, 7],
            ["Old Mill", 8, False, 2], ["Harbourside", 2, True, 1]]
    assert postprocess(plan, rows) == [("Harbourside",), ("Old Mill",), ("Old Mill",), ("Northbank",)]


def test_order_limit_offset():
    plan = plan_of("SELECT district, COUNT(*) AS n FROM households GROUP BY district "
                   "ORDER BY n DESC LIMIT 2 OFFSET 1")
    rows = [["Northbank", 5], ["Old Mill", 9], ["Harbourside", 7]]
    assert postprocess(plan, rows) == [("Harbourside", 7), ("Northbank", 5)]
    plan = plan_of("SELECT COUNT(*) FROM households GROUP BY occupants LIMIT 0")
    assert postprocess(plan, [[1]] * 8) == []
    plan = plan_of("SELECT COUNT(*) FROM households GROUP BY occupants OFFSET 6")
    assert postprocess(plan, [[i] for i in range(8)]) == [(6,), (7,)]


def test_order_by_nulls_defaults_and_overrides():
    rows = [["Northbank", None], ["Old Mill", 2], ["Harbourside", 1]]
    order = {
        "n": ["Harbourside", "Old Mill", "Northbank"],                  # ASC: NULLS LAST
        "n DESC": ["Northbank", "Old Mill", "Harbourside"],             # DESC: NULLS FIRST
        "n NULLS FIRST": ["Northbank", "Harbourside", "Old Mill"],
        "n DESC NULLS LAST": ["Old Mill", "Harbourside", "Northbank"],
    }
    for clause, expected in order.items():
        plan = plan_of(f"SELECT district, AVG(occupants) AS n FROM households GROUP BY district ORDER BY {clause}")
        assert [r[0] for r in postprocess(plan, rows)] == expected, clause


def test_order_is_stable_and_text_sorts_by_code_point():
    plan = plan_of("SELECT district, COUNT(*) FROM households GROUP BY district, has_garden ORDER BY 2, 1 DESC")
    rows = [["b", 1], ["a", 1], ["B", 2], ["a", 2], ["b", 1]]
    assert postprocess(plan, rows) == [("b", 1), ("b", 1), ("a", 1), ("a", 2), ("B", 2)]


def test_rows_of_the_wrong_width_are_a_bug():
    plan = plan_of("SELECT COUNT(*) FROM households")
    with pytest.raises(ValueError):
        postprocess(plan, [[1, 2]])


def test_compile_rejects_unknown_references():
    with pytest.raises(ValueError):
        compile_condition(exp.GT(this=exp.column("nope"), expression=exp.Literal.number(1)), 1)


# ---------------------------------------------------------------------------------------------
# Property: ORDER BY matches Python's sorted with an explicit SQL comparator; HAVING matches a
# direct evaluation.

def _plan_for(width: int, order: tuple[OrderItem, ...], limit=None, offset=None, having=None) -> Plan:
    outputs = tuple(Output(f"c{i}", "count", measures=(0,)) for i in range(width))
    return Plan(table=TABLE, measures=(Measure("count_rows"),), outputs=outputs, having=having,
                order_by=order, limit=limit, offset=offset)


def _reference_sort(rows, order):
    def compare(a, b):
        for item in order:
            x, y = a[item.output], b[item.output]
            nulls_first = item.descending if item.nulls_first is None else item.nulls_first
            if x is None or y is None:
                if x is None and y is None:
                    continue
                return (-1 if x is None else 1) * (1 if nulls_first else -1)
            if x != y:
                return (-1 if x < y else 1) * (-1 if item.descending else 1)
        return 0
    return sorted(rows, key=functools.cmp_to_key(compare))  # sorted is stable


values = st.one_of(st.none(), st.integers(-5, 5), st.decimals(-5, 5, places=1), st.floats(-5, 5))


@settings(max_examples=300, deadline=None)
@given(st.integers(1, 4).flatmap(lambda width: st.tuples(
    st.lists(st.lists(values, min_size=width, max_size=width), max_size=30),
    st.lists(st.builds(OrderItem, st.integers(0, width - 1), st.booleans(),
                       st.one_of(st.none(), st.booleans())), max_size=4),
    st.one_of(st.none(), st.integers(0, 10)), st.one_of(st.none(), st.integers(0, 10)))))
def test_order_matches_python_sorted(case):
    rows, order, limit, offset = case
    plan = _plan_for(len(rows[0]) if rows else 1, tuple(order), limit, offset)
    if not rows:
        assert postprocess(plan, []) == []
        return
    expected = _reference_sort([tuple(r) for r in rows], order)
    expected = expected[offset or 0:]
    expected = expected if limit is None else expected[:limit]
    assert postprocess(plan, rows) == expected


@settings(max_examples=300, deadline=None)
@given(st.lists(st.lists(st.one_of(st.none(), st.integers(-20, 20)), min_size=2, max_size=2), max_size=20),
       st.integers(-20, 20), st.sampled_from(["AND", "OR"]))
def test_having_matches_direct_evaluation(rows, threshold, connective):
    ref = [exp.Column(this=exp.to_identifier(output_ref(i))) for i in range(2)]
    condition = exp.And if connective == "AND" else exp.Or
    having = condition(this=exp.GT(this=ref[0], expression=exp.Literal.number(threshold)),
                       expression=exp.LT(this=ref[1], expression=exp.Literal.number(threshold)))
    plan = _plan_for(2, (), having=having)

    def truth(a, b):  # SQL three-valued AND/OR over a > t and b < t
        left = None if a is None else a > threshold
        right = None if b is None else b < threshold
        if connective == "AND":
            return False if False in (left, right) else (None if None in (left, right) else True)
        return True if True in (left, right) else (None if None in (left, right) else False)

    assert postprocess(plan, rows) == [tuple(r) for r in rows if truth(*r) is True]
