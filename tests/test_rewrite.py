"""The rewrite computes exactly what it claims: its noise-free results equal hand-written
reference SQL run on the same PostgreSQL (the database itself is the reference).

The reference queries are written differently on purpose (CASE instead of LEAST/GREATEST,
correlated subqueries per declared value instead of joins to a domain list) so that a mistake
in the rewrite's joins, clamps or domain handling cannot be repeated in its reference.
"""

from __future__ import annotations

from decimal import Decimal

import psycopg
import pytest

from proxy.policy import load_policies
from proxy.sql.analyse import analyse
from proxy.sql.rewrite import rewrite
from tests.bounds_helpers import run_with_bounds
from tests.policy_fixtures import load_clinic, write_policies

WARDS = "unnest(ARRAY['north','south','east']) WITH ORDINALITY AS w(v, i)"


@pytest.fixture(scope="module")
def clinic(module_dsn: str, tmp_path_factory: pytest.TempPathFactory):
    load_clinic(module_dsn)
    policies = load_policies(write_policies(tmp_path_factory.mktemp("policies"),
                                            most_rows=3, bounds="declared"))
    with psycopg.connect(module_dsn, autocommit=True) as conn:
        yield conn, policies


def measures_of(clinic, sql: str, exact: frozenset[str] = frozenset()) -> list[tuple]:
    """The rewrite's noise-free rows for ``sql``: key ordinals dropped, measures as ints."""
    conn, policies = clinic
    plan = analyse(sql, policies, "tester")
    rewritten = rewrite(plan, exact)
    rows = run_with_bounds(conn, rewritten)
    assert len(rows) == rewritten.cells
    keys = len(plan.keys)
    return [tuple(int(v) for v in row[keys:keys + len(plan.measures)]) for row in rows]


def reference(clinic, sql: str) -> list[tuple]:
    conn, _ = clinic
    return [tuple(int(v) if v is not None else 0 for v in row)
            for row in conn.execute(sql).fetchall()]


CLAMPED_MINUTES = "CASE WHEN minutes > 60 THEN 60 WHEN minutes < 0 THEN 0 ELSE minutes END"
CLAMPED_AGE = "CASE WHEN age > 100 THEN 100 WHEN age < 0 THEN 0 ELSE age END"
WEIGHT_UNITS = ("CASE WHEN round(weight * 2) > 240 THEN 240 WHEN round(weight * 2) < -10 "
                "THEN -10 ELSE round(weight * 2) END")

# The person's visits in wards of ordinal (in declared order) compared with what follows.
_VISITS_OF_PERSON = ("(SELECT count(*) FROM clinic.visits y WHERE y.person_id = v.person_id "
                     "AND array_position(ARRAY['north','south','east'], y.ward)")

CASES = [
    ("SELECT COUNT(*) FROM people", "SELECT count(*) FROM clinic.people"),
    ("SELECT COUNT(age), SUM(age) FROM people",
     f"SELECT count(age), sum({CLAMPED_AGE}) FROM clinic.people"),
    ("SELECT ward, COUNT(*) FROM people GROUP BY ward",
     f"SELECT (SELECT count(*) FROM clinic.people p WHERE p.ward = w.v) FROM {WARDS} ORDER BY w.i"),
    ("SELECT ward, SUM(weight) AS w, AVG(weight) FROM people GROUP BY ward",
     f"SELECT (SELECT sum({WEIGHT_UNITS}) FROM clinic.people p WHERE p.ward = w.v), "
     f"(SELECT count(weight) FROM clinic.people p WHERE p.ward = w.v) FROM {WARDS} ORDER BY w.i"),
    ("SELECT age, COUNT(*) FROM people WHERE smoker GROUP BY age",
     "SELECT (SELECT count(*) FROM clinic.people p WHERE p.smoker AND p.age = a) "
     "FROM generate_series(0, 100) AS a ORDER BY a"),
    ("SELECT smoker, COUNT(*) FROM people GROUP BY smoker",
     "SELECT (SELECT count(*) FROM clinic.people p WHERE p.smoker = b.v) "
     "FROM unnest(ARRAY[false, true]) WITH ORDINALITY AS b(v, i) ORDER BY b.i"),
    ("SELECT date_trunc('quarter', admitted) AS q, COUNT(*) FROM people GROUP BY 1",
     "SELECT (SELECT count(*) FROM clinic.people p WHERE date_trunc('quarter', p.admitted) = q) "
     "FROM generate_series(DATE '2026-01-01', DATE '2026-10-01', INTERVAL '3 months') AS q ORDER BY q"),
    ("SELECT ward, COUNT(*) FROM people WHERE age BETWEEN 20 AND 60 AND ward IN ('north', 'east') "
     "OR weight IS NULL GROUP BY ward",
     f"SELECT (SELECT count(*) FROM clinic.people p WHERE p.ward = w.v AND "
     f"((p.age >= 20 AND p.age <= 60 AND p.ward IN ('north', 'east')) OR p.weight IS NULL)) "
     f"FROM {WARDS} ORDER BY w.i"),
    ("SELECT COUNT(*) FROM people WHERE ward LIKE 'no%' AND NOT smoker",
     "SELECT count(*) FROM clinic.people WHERE ward LIKE 'no%' AND NOT smoker"),
    # visits: one person owns many rows; most_rows 3 (declared), minutes in [0, 60]. Each
    # person's partials are all scaled by w = min(1, 3 / rows, 180 / total minutes), each
    # rounded toward zero. With one cell, that is a cap on the person's count or sum.
    ("SELECT COUNT(*) FROM visits",
     "SELECT sum(CASE WHEN c > 3 THEN 3 ELSE c END) FROM "
     "(SELECT person_id, count(*) AS c FROM clinic.visits GROUP BY person_id) s"),
    ("SELECT SUM(minutes) FROM visits",
     f"SELECT sum(CASE WHEN s > 180 THEN 180 ELSE s END) FROM (SELECT person_id, "
     f"sum({CLAMPED_MINUTES}) AS s FROM clinic.visits GROUP BY person_id) t"),
    # Both bounds: the sum shrinks with the rows (3 / c) too; every person is in the one cell.
    ("SELECT SUM(minutes), COUNT(DISTINCT person_id) FROM visits",
     f"SELECT sum(least(s, trunc(s * 3.0 / c), 180)), count(*) FROM (SELECT person_id, count(*) AS c, "
     f"sum({CLAMPED_MINUTES}) AS s FROM clinic.visits GROUP BY person_id) t"),
    # Per ward: the person's rows are scaled by 3 / (its rows in the three wards) and rounded
    # cumulatively in ward order: the ward keeps f(its rows up to this ward) - f(its rows before
    # it), f(x) = min(x, floor(3x / total)); a person in at most 3 cells is always counted once
    # per ward it visited.
    ("SELECT ward, COUNT(*), COUNT(DISTINCT person_id) FROM visits GROUP BY ward",
     f"SELECT (SELECT sum(least(x.upto, x.upto * 3 / x.total) - least(x.before, x.before * 3 / x.total)) "
     f"FROM (SELECT v.person_id, {_VISITS_OF_PERSON} <= w.i) AS upto, "
     f"{_VISITS_OF_PERSON} < w.i) AS before, {_VISITS_OF_PERSON} <= 3) AS total "
     f"FROM clinic.visits v WHERE v.ward = w.v GROUP BY v.person_id) x), "
     f"(SELECT count(DISTINCT person_id) FROM clinic.visits x WHERE x.ward = w.v) "
     f"FROM {WARDS} ORDER BY w.i"),
]


@pytest.mark.parametrize("query, expected", CASES, ids=[c[0][:60] for c in CASES])
def test_rewrite_matches_reference_sql(clinic, query: str, expected: str) -> None:
    got = measures_of(clinic, query)
    want = reference(clinic, expected)
    # The measures of each cell, in the plan's order, must equal the reference's columns.
    assert got == want


EXACT_WEIGHT_UNITS = ("floor(sum(CASE WHEN weight > 120 THEN 120 WHEN weight < -5 THEN -5 "
                      "ELSE weight END) / 0.5 + 0.5)")


@pytest.mark.parametrize("query, expected", [
    ("SELECT SUM(weight) FROM people", f"SELECT {EXACT_WEIGHT_UNITS} FROM clinic.people"),
    ("SELECT ward, SUM(weight) FROM people GROUP BY ward",
     f"SELECT (SELECT {EXACT_WEIGHT_UNITS} FROM clinic.people p WHERE p.ward = w.v) "
     f"FROM {WARDS} ORDER BY w.i"),
])
def test_numeric_sums_are_exact_then_converted_to_steps_once(clinic, query: str, expected: str) -> None:
    # weight is numeric in the backend: clamped values add up exactly, then become steps.
    assert measures_of(clinic, query, frozenset({"weight"})) == reference(clinic, expected)


def test_empty_cells_are_zero_and_outside_values_are_not_counted(clinic) -> None:
    conn, _ = clinic
    # 'west' and NULL wards exist in the data but are outside the declared domain.
    outside = conn.execute(
        "SELECT count(*) FROM clinic.people WHERE ward IS NULL OR ward = 'west'").fetchone()[0]
    assert outside > 0
    total = conn.execute("SELECT count(*) FROM clinic.people").fetchone()[0]
    counted = sum(row[0] for row in measures_of(clinic, "SELECT ward, COUNT(*) FROM people GROUP BY ward"))
    assert counted == total - outside
    rows = measures_of(clinic, "SELECT age, COUNT(*) FROM people WHERE age < 1000 GROUP BY age")
    assert len(rows) == 101  # a WHERE wider than the declared range narrows nothing
    # A WHERE no declared value passes leaves no cell (PostgreSQL's answer is empty too).
    assert measures_of(clinic, "SELECT age, COUNT(*) FROM people WHERE age > 1000 GROUP BY age") == []


def test_average_parts_are_a_midpoint_sum_and_the_count_of_values(clinic) -> None:
    conn, policies = clinic
    plan = analyse("SELECT AVG(weight) FROM people", policies, "tester")
    kinds = [m.kind for m in plan.measures]
    assert kinds == ["midpoint_sum", "count_values"]
    (row,) = measures_of(clinic, "SELECT AVG(weight) FROM people")
    # weight in [-5, 120], step 0.5: [-10, 240] in steps, so 2 x - 230 in half steps.
    total, count = conn.execute(f"SELECT 2 * sum({WEIGHT_UNITS}) - 230 * count(weight), "
                                "count(weight) FROM clinic.people").fetchone()
    assert row == (int(total), count)
    # Centred on 57.5: the average is 57.5 + (centred sum / 4) / count, inside the range.
    assert -5 < Decimal("57.5") + Decimal(row[0]) / 4 / row[1] < 120


def test_an_average_beside_the_sum_of_its_column_reuses_the_plain_sum(clinic) -> None:
    _, policies = clinic
    plan = analyse("SELECT SUM(weight), AVG(weight), AVG(age) FROM people", policies, "tester")
    assert [m.kind for m in plan.measures] == ["sum", "count_values", "midpoint_sum", "count_values"]
    # Also when the SUM is only named in HAVING.
    plan = analyse("SELECT AVG(weight) FROM people HAVING SUM(weight) > 0", policies, "tester")
    assert [m.kind for m in plan.measures] == ["sum", "count_values"]


def test_centred_average_on_a_table_with_declared_bounds(clinic) -> None:
    # visits: most_rows 3 declared, minutes in [0, 60] centred on 30: per person, its centred
    # sum 2 s - 60 n and its count n scale by w = min(1, 3 / rows) (the rows bound alone).
    got = measures_of(clinic, "SELECT AVG(minutes) FROM visits")
    want = reference(clinic, (
        f"SELECT sum(sign(p) * least(abs(p), abs(p) * 3 / c)), sum(least(n, n * 3 / c)) "
        f"FROM (SELECT person_id, count(*) AS c, count(minutes) AS n, "
        f"2 * sum({CLAMPED_MINUTES}) - 60 * count(minutes) AS p FROM clinic.visits "
        f"GROUP BY person_id) t"))
    assert got == want
