"""Removing one individual moves each noise-free aggregate by no more than the sensitivity the
engine claims (L1 over all cells), on real PostgreSQL, for row tables and for tables with
individuals owning many rows in many cells; and each bound's clipped-away total by no more than
the sensitivity its noisy figure is calibrated to.

Bounds chosen per query are fixed by the test (the same in both neighbouring databases): the
privacy argument in proxy.sql.rewrite treats the measures given the chosen bounds.
"""

from __future__ import annotations

import psycopg
import pytest

from proxy.policy import load_policies
from proxy.sql.analyse import analyse
from proxy.sql.rewrite import loss_cap, rewrite
from tests.bounds_helpers import run_with_bounds
from tests.policy_fixtures import load_clinic, write_policies


@pytest.fixture(scope="module")
def clinic(module_dsn: str, tmp_path_factory: pytest.TempPathFactory):
    load_clinic(module_dsn, people=600)
    policies = load_policies(write_policies(tmp_path_factory.mktemp("policies"), most_rows=10))
    with psycopg.connect(module_dsn) as conn:
        yield conn, policies


@pytest.fixture(scope="module")
def declared(clinic, tmp_path_factory: pytest.TempPathFactory):
    """The same clinic with visits' bounds declared at most_rows 4, below the heaviest
    individuals' 9 rows: averages are centred, and the bound clips."""
    conn, _ = clinic
    return conn, load_policies(write_policies(tmp_path_factory.mktemp("declared"), most_rows=4,
                                              bounds="declared"))


QUERIES = [
    ("visits", "SELECT COUNT(*), SUM(minutes), COUNT(DISTINCT person_id) FROM visits"),
    ("visits", "SELECT ward, COUNT(*), SUM(minutes), COUNT(DISTINCT person_id) FROM visits GROUP BY ward"),
    ("visits", "SELECT ward, SUM(fee), AVG(fee) FROM visits GROUP BY ward"),
    ("visits", "SELECT date_trunc('month', visited) AS m, ward, COUNT(*), AVG(minutes) "
               "FROM visits WHERE minutes > 5 GROUP BY 1, 2"),
    ("people", "SELECT ward, COUNT(*), SUM(weight), SUM(age) FROM people GROUP BY ward"),
    ("people", "SELECT age, COUNT(*) FROM people GROUP BY age"),
    ("visits", "SELECT ward, VARIANCE(minutes), STDDEV_POP(fee) FROM visits GROUP BY ward"),
    ("visits", "SELECT ward, median(minutes) FROM visits GROUP BY ward"),  # a histogram per ward
    ("people", "SELECT VARIANCE(age), STDDEV(weight) FROM people"),
    ("people", "SELECT ward, percentile_disc(0.3) WITHIN GROUP (ORDER BY weight) FROM people "
               "GROUP BY ward"),
    # FILTER and bounded values: a filtered sum named before the unfiltered one of the same
    # column gets a bound of its own (never one computed from another measure's totals).
    ("visits", "SELECT ward, SUM(minutes) FILTER (WHERE fee > 20), SUM(minutes) FROM visits "
               "GROUP BY ward"),
    ("visits", "SELECT ward, SUM(minutes) FILTER (WHERE fee > 20), SUM(minutes), "
               "COUNT(*) FILTER (WHERE minutes > 30), "
               "COUNT(DISTINCT person_id) FILTER (WHERE fee > 10) FROM visits GROUP BY ward"),
    ("visits", "SELECT ward, AVG(CASE WHEN minutes > 30 THEN 1 ELSE 0 END), "
               "SUM(CASE WHEN fee > 40 THEN 3 ELSE -1 END) FROM visits GROUP BY ward"),
    ("people", "SELECT ward, SUM(smoker::int), AVG(age) FILTER (WHERE smoker), "
               "COUNT(*) FILTER (WHERE age > 50) FROM people GROUP BY ward"),
]


def _bound_choices(rewritten) -> list[tuple[int, ...]]:
    """The ceilings, and candidates near a third of them, which clip the heavier individuals
    (visits: up to 9 rows a person)."""
    if not rewritten.bounds:
        return [()]
    if not any(b.chosen for b in rewritten.bounds):
        return [tuple(b.ceiling for b in rewritten.bounds)]
    ceilings = tuple(b.ceiling for b in rewritten.bounds)
    small = tuple(min(b.candidates, key=lambda c: abs(3 * c - b.ceiling)) for b in rewritten.bounds)
    return [ceilings, small]


# Centred averages (declared bounds, or the row table): the centred sum of each AVG.
CENTRED = [
    ("visits", "SELECT ward, AVG(minutes), AVG(fee) FROM visits GROUP BY ward"),
    ("visits", "SELECT visited, COUNT(*), AVG(minutes) FROM visits GROUP BY visited"),
    ("people", "SELECT ward, AVG(weight), AVG(age) FROM people GROUP BY ward"),
]


@pytest.mark.parametrize("exact", [frozenset(), frozenset({"weight", "fee"})], ids=["per-row", "exact"])
@pytest.mark.parametrize("table, sql", QUERIES, ids=[q[1][:50] for q in QUERIES])
def test_one_individual_moves_each_measure_at_most_its_sensitivity(
        clinic, table: str, sql: str, exact: frozenset[str]) -> None:
    _check_neighbours(clinic, table, sql, exact)


@pytest.mark.parametrize("exact", [frozenset(), frozenset({"weight", "fee"})], ids=["per-row", "exact"])
@pytest.mark.parametrize("table, sql", CENTRED, ids=[q[1][:50] for q in CENTRED])
def test_one_individual_moves_a_centred_average_at_most_its_sensitivity(
        declared, table: str, sql: str, exact: frozenset[str]) -> None:
    assert "midpoint_sum" in [m.kind for m in analyse(sql, declared[1], "tester").measures]
    _check_neighbours(declared, table, sql, exact)


def _check_neighbours(clinic, table: str, sql: str, exact: frozenset[str]) -> None:
    """Removing any of the heaviest individuals (and a few ordinary ones) moves each measure
    (L1 over cells) and each clipped-away total by at most its claimed sensitivity."""
    conn, policies = clinic
    plan = analyse(sql, policies, "tester")
    rewritten = rewrite(plan, exact)
    # a percentile plan's backend rows carry its histogram bucket as one more key
    keys, measures = len(plan.keys) + (plan.ranked is not None), len(plan.measures)
    # The heaviest individuals (most rows) and a few ordinary ones.
    people = [row[0] for row in conn.execute(
        f"SELECT person_id FROM clinic.{table} GROUP BY person_id "
        f"ORDER BY count(*) DESC, person_id LIMIT 6").fetchall()] + [3, 50, 301]
    for values in _bound_choices(rewritten):
        full = run_with_bounds(conn, rewritten, values)
        sensitivities = rewritten.sensitivities(values)
        largest_move = [0] * measures
        for person in people:
            with conn.transaction(force_rollback=True):
                conn.execute(f"DELETE FROM clinic.{table} WHERE person_id = %s", (person,))
                without = run_with_bounds(conn, rewritten, values)
            for n in range(measures):
                move = sum(abs(int(a[keys + n]) - int(b[keys + n])) for a, b in zip(full, without))
                assert move <= sensitivities[n], (person, plan.measures[n], values)
                largest_move[n] = max(largest_move[n], move)
            for j in range(len(rewritten.bounds)):
                column = keys + measures + len(rewritten.bounds) + j
                move = abs(int(full[0][column]) - int(without[0][column]))
                assert move <= loss_cap(rewritten.bounds, j, values), (person, j)
        # The test would catch a broken bound: some individual does move every measure.
        assert all(m > 0 for m in largest_move), (largest_move, values)


def test_claimed_sensitivities_follow_the_bounds(clinic, declared) -> None:
    _, policies = clinic
    grouped = rewrite(analyse(
        "SELECT ward, COUNT(*), SUM(minutes), COUNT(DISTINCT person_id) FROM visits GROUP BY ward",
        policies, "tester"))
    # most_rows 10, minutes in [0, 60]: ceilings 10 rows and 600 minutes; the distinct count
    # moves by at most min(R, cells): one per cell the individual is counted in.
    assert [b.ceiling for b in grouped.bounds] == [10, 600]
    assert grouped.declared_sensitivities == (10, 600, 3)
    assert grouped.sensitivities((4, 120)) == (4, 120, 3)
    assert grouped.sensitivities((2, 120)) == (2, 120, 2)
    # A centred sum moves by at most R times the range's width (in half steps): 4 * 60.
    centred = rewrite(analyse("SELECT AVG(minutes) FROM visits", declared[1], "tester"))
    assert centred.declared_sensitivities == (240, 4)
    rows = rewrite(analyse("SELECT ward, COUNT(*), SUM(weight) FROM people GROUP BY ward",
                           policies, "tester"))
    # Row table: count and histogram sensitivity 1 (common practice); weight in [-5, 120] with
    # step 0.5 is 240 units at most; centred on 57.5, one weight moves 2 x - 230 (half steps)
    # by at most 250, i.e. 62.5 kg, half the range's width.
    assert rows.sensitivities() == (1, 240)
    assert rewrite(analyse("SELECT AVG(weight) FROM people", policies,
                           "tester")).sensitivities() == (250, 1)


def test_an_individual_over_the_row_bound_contributes_the_bound_in_total(clinic) -> None:
    conn, policies = clinic
    heavy = conn.execute("SELECT person_id FROM clinic.visits GROUP BY 1 HAVING count(*) = 9 "
                         "LIMIT 1").fetchone()[0]
    for sql, expected in [
            # One cell: nine rows scaled by 4/9 count exactly 4.
            ("SELECT COUNT(*) FROM visits", {4}),
            # Several cells: the shares are rounded cumulatively over its cells, so they add up
            # to exactly floor(9 * 4/9) = 4 too, never fewer (rounding each share toward zero
            # would lose up to one row per cell).
            ("SELECT ward, COUNT(*) FROM visits GROUP BY ward", {4}),
            ("SELECT visited, COUNT(*) FROM visits GROUP BY visited", {4})]:
        plan = analyse(sql, policies, "tester")
        rewritten = rewrite(plan)
        keys = len(plan.keys)
        full = run_with_bounds(conn, rewritten, (4,))
        with conn.transaction(force_rollback=True):
            conn.execute("DELETE FROM clinic.visits WHERE person_id = %s", (heavy,))
            without = run_with_bounds(conn, rewritten, (4,))
        moved = sum(int(a[keys]) - int(b[keys]) for a, b in zip(full, without))
        assert moved in expected, (sql, moved)
