"""Post-processing in the select list, FILTER and bounded per-row values, against PostgreSQL.

- Select-list expressions over aggregates (arithmetic, round, casts, coalesce) have the result
  type PostgreSQL gives the same expression, and the value PostgreSQL computes from the same
  aggregate values (the aggregates are PostgreSQL's own, over a table typed as the mirror
  types the policy's columns).
- Where PostgreSQL raises on a value (division by zero, an integer cast out of range), the
  proxy answers NULL.
- The accuracy of a linear function of one noisy value holds as often as the stated 95%, and
  the same check fails when the slope is left out.
- End to end with the noise forced to zero: FILTER, AVG/SUM of a boolean cast and of a CASE,
  and expressions equal PostgreSQL's exact answers; EXPLAIN states each measure's sensitivity.
"""

from __future__ import annotations

import math
from decimal import Decimal
from fractions import Fraction

import psycopg
import pytest

from proxy import engine as engine_module
from proxy import noise
from proxy.answer import Accuracy
from proxy.sql.analyse import analyse
from proxy.sql.postprocess import carried_accuracy, postprocess
from tests.test_analyse import POLICIES
from tests.test_engine import clinic_dsn, exact, make_engine  # noqa: F401  (fixtures)

# A table typed as the data-free mirror types households' columns (proxy.wire.catalog), with
# values whose sums and quotients meet rounding ties.
_HOUSEHOLDS = """
    CREATE SCHEMA utility;
    CREATE TABLE utility.households (household_id integer, district text, occupants integer,
                                     tariff text, has_garden boolean, connected_on date,
                                     area numeric);
    INSERT INTO utility.households (district, occupants, area) VALUES
        ('Northbank', 3, 12.5), ('Northbank', 4, 0.5), ('Northbank', 2, 7.0),
        ('Old Mill', 7, 2.25), ('Old Mill', 1, -3.5),
        ('Harbourside', 5, 300.5), ('Harbourside', 6, 33.0), ('Harbourside', 2, 1.0),
        ('Harbourside', 8, 0.0);
"""

# Select-list expressions over COUNT(*), SUM(occupants) (bigint) and SUM(area) (numeric).
EXPRESSIONS = [
    "SUM(occupants) / COUNT(*)",
    "SUM(area) / COUNT(*)",
    "SUM(occupants) / 1000.0",
    "SUM(area) / 1000",
    "SUM(occupants) / -2",
    "round(SUM(area), 0)",
    "round(SUM(area) / 3, 1)",
    "round(SUM(occupants))",
    "round(SUM(area))",
    "COUNT(*)::int",
    "COUNT(*)::integer * 3",
    "CAST(SUM(area) AS numeric(7, 1))",
    "(SUM(area) / 7)::numeric(6, 2)",
    "SUM(area)::float",
    "SUM(area)::float / COUNT(*)",
    "SUM(occupants)::bigint",
    "(SUM(area) / 4)::integer",
    "coalesce(SUM(area), 0)",
    "coalesce(SUM(occupants), 0.5)",
    "-SUM(occupants) * 2 + 1",
    "SUM(occupants) - SUM(area)",
    "(COUNT(*) + 1) * 2.5",
    "SUM(occupants) * 1e2",
    "COUNT(*)::int + 3000000000",
    "COUNT(*)::int * 2",
]


@pytest.fixture(scope="module")
def households_dsn(module_dsn: str) -> str:
    with psycopg.connect(module_dsn, autocommit=True) as conn:
        conn.execute(_HOUSEHOLDS)
    return module_dsn


def _aggregate_row(plan, count: int, occupants: int, area: Decimal, district: str) -> list:
    """The noisy row the engine would hand post-processing, holding the given aggregates."""
    row: list = []
    for output in plan.outputs:
        measure = plan.measures[output.measures[0]] if output.measures else None
        row.append({"key": district, "count": count, "expression": None}.get(output.kind)
                   if output.kind != "sum" else (occupants if measure.column == "occupants" else area))
    return row


@pytest.mark.parametrize("expression", EXPRESSIONS)
def test_select_expressions_have_postgresql_types_and_values(households_dsn: str,
                                                              expression: str) -> None:
    plan = analyse(f"SELECT district, {expression} AS x FROM households GROUP BY district",
                   POLICIES, "planner")
    [x] = [o for o in plan.outputs if o.name == "x"]
    # PostgreSQL's own type and value of the same expression over its own aggregates.
    truth = exact(households_dsn,
                  f"SELECT district, COUNT(*), SUM(occupants), SUM(area), {expression}, "
                  f"pg_typeof({expression})::text FROM utility.households GROUP BY district "
                  "ORDER BY district")
    for district, count, occupants, area, value, pg_type in truth:
        assert x.type == pg_type, (expression, x.type, pg_type)
        [answer] = postprocess(plan, [_aggregate_row(plan, count, occupants, area, district)])
        assert type(answer[1]) is type(value), (expression, answer[1], value)
        tolerance = Decimal("1e-14") * max(1, abs(Decimal(value)))  # PostgreSQL's numeric
        assert abs(Decimal(answer[1]) - Decimal(value)) <= tolerance, (expression, answer, value)


def test_postgresql_names_unaliased_expressions_as_analysis_does(households_dsn: str) -> None:
    written = "COUNT(*)::int, round(SUM(area), 1), SUM(occupants) / COUNT(*), coalesce(SUM(area), 0)"
    plan = analyse(f"SELECT {written} FROM households", POLICIES, "planner")
    with psycopg.connect(households_dsn) as conn:
        cursor = conn.execute(f"SELECT {written} FROM utility.households")
        names = [column.name for column in cursor.description]
    assert [o.name for o in plan.visible_outputs] == names


def test_where_postgresql_raises_the_answer_is_null() -> None:
    plan = analyse("SELECT SUM(occupants) / COUNT(*), SUM(area) / (COUNT(*) - 2), "
                   "COUNT(*)::int, round(SUM(area) / COUNT(*), 2) FROM households",
                   POLICIES, "planner")
    rows = []
    for count, occupants, area in [(0, 5, Decimal("1.5")), (2, 5, Decimal("1.5")),
                                   (2 ** 31, 5, Decimal(0))]:
        row = _aggregate_row(plan, count, occupants, area, "")
        rows.append(row)
    answers = postprocess(plan, rows)
    assert answers[0] == (None, Decimal("-0.75"), 0, None)  # a noisy zero divides nothing
    assert answers[1] == (2, None, 2, Decimal("0.75"))
    assert answers[2][2] is None  # out of integer's range: 22003 in PostgreSQL


def _coverage(plan, index: int, truth: int, scale: Fraction, draws: int, slope_kept: bool) -> float:
    """How often the stated bound of output ``index`` (an expression of the count, output 0)
    holds the plain answer, over ``draws`` noisy counts."""
    bound = noise.bound95(scale)
    part = Accuracy(column="count", epsilon=Decimal(1), sensitivity=Decimal(1), scale=scale,
                    bound95=Decimal(bound), note="discrete Laplace")
    stated = carried_accuracy(plan, index, {0: part})
    assert stated is not None and stated.bound95 is not None
    width = stated.bound95 if slope_kept else Decimal(bound)
    [plain] = postprocess(plan, [[truth, None]])
    noisy = postprocess(plan, [[truth + int(z), None] for z in noise.sample_discrete_laplace(scale, draws)])
    return sum(abs(Decimal(row[1]) - Decimal(plain[1])) <= width for row in noisy) / draws


def test_a_linear_function_of_one_noisy_value_keeps_its_stated_coverage() -> None:
    plan = analyse("SELECT COUNT(*), round(COUNT(*) * 2.5 - 3, 1) AS scaled FROM households",
                   POLICIES, "planner")
    # Each draw lies inside with probability >= 0.95 (the bound's definition); a one-sided test
    # at 4 binomial standard errors over 4000 draws: sqrt(0.95 * 0.05 / 4000) = 0.0034.
    draws = 4000
    threshold = 0.95 - 4 * math.sqrt(0.95 * 0.05 / draws)
    assert _coverage(plan, 1, 500, Fraction(8), draws, slope_kept=True) >= threshold
    # The same check fails for a bound that leaves the slope out.
    assert _coverage(plan, 1, 500, Fraction(8), draws, slope_kept=False) < threshold


def test_ratios_say_they_are_derived_and_name_their_parts() -> None:
    plan = analyse("SELECT SUM(occupants) / COUNT(*) AS per_household FROM households",
                   POLICIES, "planner")
    parts = {i: Accuracy(column=o.name, epsilon=Decimal("0.5"), sensitivity=Decimal(1),
                         scale=Fraction(2), bound95=Decimal(6), note="discrete Laplace")
             for i, o in enumerate(plan.outputs) if o.kind != "expression"}
    stated = carried_accuracy(plan, 0, parts)
    assert stated is not None and stated.bound95 is None and stated.epsilon == 1
    assert "derived" in stated.note and "sum within ±6" in stated.note \
        and "count within ±6" in stated.note


# ---- end to end, noise forced to zero --------------------------------------------------------

def _clamped(column: str, low: int, high: int) -> str:
    """The declared-range clamp the rewrite applies, written for the reference query."""
    return f"CASE WHEN {column} < {low} THEN {low} WHEN {column} > {high} THEN {high} ELSE {column} END"


@pytest.fixture
def noiseless(monkeypatch) -> None:
    monkeypatch.setattr(engine_module.noise, "sample_discrete_laplace",
                        lambda scale, size: [0] * size)


WARDS = "ward IN ('north', 'south', 'east')"


def test_filter_and_bounded_values_match_postgresql(make_engine, clinic_dsn, noiseless) -> None:
    engine = make_engine()
    answer = engine.answer(
        "tester",
        "SELECT ward, COUNT(*) FILTER (WHERE smoker), SUM(age) FILTER (WHERE ward = 'north'), "
        "AVG(smoker::int), SUM(smoker::int), AVG(CASE WHEN age > 50 THEN 1 ELSE 0 END), "
        "SUM(CASE WHEN age > 50 THEN 2 WHEN age IS NULL THEN NULL ELSE -1 END), "
        "COUNT(age) FILTER (WHERE admitted >= '2026-06-01') "
        "FROM people GROUP BY ward", epsilon=Decimal(1))
    # PostgreSQL's exact answer, over the rows the policy counts (wards in the domain, ages
    # clamped to the declared [0, 100]); empty sums are 0 in hushql's cells.
    truth = exact(clinic_dsn, f"""
        SELECT ward, COUNT(*) FILTER (WHERE smoker),
               COALESCE(SUM({_clamped('age', 0, 100)}) FILTER (WHERE ward = 'north'), 0),
               AVG(smoker::int), SUM(smoker::int), AVG(CASE WHEN age > 50 THEN 1 ELSE 0 END),
               SUM(CASE WHEN age > 50 THEN 2 WHEN age IS NULL THEN NULL ELSE -1 END),
               COUNT(age) FILTER (WHERE admitted >= '2026-06-01')
        FROM clinic.people WHERE {WARDS} GROUP BY ward
        ORDER BY array_position(ARRAY['north', 'south', 'east'], ward)""")
    assert len(answer.rows) == len(truth) == 3
    for got, want in zip(answer.rows, truth):
        assert got[:3] == want[:3] and got[4] == want[4] and got[6:] == want[6:], (got, want)
        for index in (3, 5):  # averages: the proxy's are rounded to 6 places for display
            assert abs(Decimal(repr(got[index])) - want[index]) <= Decimal("1e-6"), (got, want)
    assert [c.type for c in answer.columns] == ["text", "bigint", "bigint", "double precision",
                                                "bigint", "double precision", "bigint", "bigint"]


def test_filter_on_a_table_with_individuals_matches_postgresql(make_engine, clinic_dsn,
                                                               noiseless) -> None:
    # Declared bounds above every person's own rows (at most 9 visits of at most 60 minutes):
    # nobody is scaled down, so the noiseless answer is the plain one.
    engine = make_engine(bounds="declared", most_rows=10)
    query = ("SELECT COUNT(*) FILTER (WHERE minutes > 30), "
             "COUNT(DISTINCT person_id) FILTER (WHERE ward = 'north'), "
             "SUM(minutes) FILTER (WHERE ward = 'south'), AVG(minutes) FILTER (WHERE fee > 20) "
             "FROM visits")
    answer = engine.answer("tester", query, epsilon=Decimal(1))
    [truth] = exact(clinic_dsn, f"""
        SELECT COUNT(*) FILTER (WHERE minutes > 30),
               COUNT(DISTINCT person_id) FILTER (WHERE ward = 'north'),
               SUM({_clamped('minutes', 0, 60)}) FILTER (WHERE ward = 'south'),
               AVG({_clamped('minutes', 0, 60)}) FILTER (WHERE fee > 20)
        FROM clinic.visits WHERE person_id IS NOT NULL""")
    [row] = answer.rows
    assert row[:3] == truth[:3]
    assert abs(Decimal(repr(row[3])) - truth[3]) <= Decimal("1e-6")


def test_select_expressions_end_to_end_match_postgresql(make_engine, clinic_dsn, noiseless) -> None:
    engine = make_engine()
    answer = engine.answer(
        "tester", "SELECT ward, SUM(age) / COUNT(*) AS per_person, COUNT(*)::int AS n, "
                  "SUM(age) / 1000.0 AS thousands, round(SUM(weight), 0) AS weight "
                  "FROM people GROUP BY ward ORDER BY per_person DESC, ward", epsilon=Decimal(1))
    age = _clamped("age", 0, 100)
    # weight: clamped to [-5, 120], summed exactly (numeric) and counted in steps of 0.5.
    truth = exact(clinic_dsn, f"""
        SELECT ward, SUM({age}) / COUNT(*), COUNT(*)::int, SUM({age}) / 1000.0,
               round(floor(SUM({_clamped('weight', -5, 120)}) / 0.5 + 0.5) * 0.5, 0)
        FROM clinic.people WHERE {WARDS} GROUP BY ward ORDER BY 2 DESC, 1""")
    assert [tuple(r) for r in answer.rows] == [tuple(r) for r in truth]
    assert [c.type for c in answer.columns] == ["text", "bigint", "integer", "numeric", "numeric"]
    notice = {a.column: a for a in answer.accuracy}
    assert notice["per_person"].bound95 is None and "derived" in notice["per_person"].note
    # SUM(age): sensitivity 100 at epsilon 1/3 (three measures), scale 300; the expression
    # divides it by 1000, and its bound with it.
    assert notice["thousands"].bound95 == Decimal(noise.bound95(Fraction(300))) / 1000
    assert abs(notice["thousands"].scale - Fraction(3, 10)) < Fraction(1, 10 ** 20)  # 1/3 as a Decimal


def test_explain_states_the_sensitivity_of_filtered_and_bounded_measures(make_engine) -> None:
    engine = make_engine()
    explained = engine.explain("tester", "SELECT COUNT(*) FILTER (WHERE smoker), "
                                         "SUM(age) FILTER (WHERE ward = 'north'), "
                                         "SUM(CASE WHEN age > 50 THEN 3 ELSE -2 END) FROM people")
    items = {row[0]: row[1] for row in explained.rows}
    assert items['measure count(*) FILTER (WHERE "smoker")'].startswith("sensitivity 1,")
    assert items['measure sum(age FILTER (WHERE "ward" = \'north\'))'].startswith("sensitivity 100,")
    assert items["measure sum(CASE WHEN age > 50 THEN 3 ELSE -2 END)"].startswith("sensitivity 3,")
    explained = engine.explain("tester", "SELECT round(SUM(age) / COUNT(*)::numeric, 1) AS mean "
                                         "FROM people")
    items = {row[0]: row[1] for row in explained.rows}
    assert items["output mean"] == ('computed in the proxy on the noisy answer: '
                                    'ROUND("sum" / CAST("count" AS DECIMAL), 1)')


def test_having_and_order_by_name_filtered_aggregates() -> None:
    plan = analyse("SELECT district, COUNT(*) FILTER (WHERE has_garden) AS gardens "
                   "FROM households GROUP BY district "
                   "HAVING COUNT(*) FILTER (WHERE has_garden) > 1 "
                   "ORDER BY COUNT(*) FILTER (WHERE has_garden) DESC", POLICIES, "planner")
    # One measure: the select list, HAVING and ORDER BY name the same filtered count.
    assert len(plan.measures) == 1 and plan.order_by[0].output == 1
    rows = postprocess(plan, [["Northbank", 1], ["Old Mill", 5], ["Harbourside", 3]])
    assert rows == [("Old Mill", 5), ("Harbourside", 3)]
