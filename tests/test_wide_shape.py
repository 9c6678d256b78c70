"""The one-row-per-individual shape of the per-individual rewrite (``proxy.sql.rewrite``, module
notes 11) returns the same rows as the joined shape, on real PostgreSQL: measures, the bounds
the noisy max chose and the clipped-away totals, for every kind of measure, with bounds at
their ceilings, forced low enough to scale the heavier individuals, and chosen under drawn
noise; with declared bounds and with chosen ones. The Spark backend asks for this shape
(``tests/test_spark.py`` compares its rows on Spark with the joined shape's on PostgreSQL).
"""

from __future__ import annotations

import random

import psycopg
import pytest

from proxy.policy import load_policies
from proxy.sql.analyse import analyse
from proxy.sql.rewrite import BOUND_NOISE_SETTING, WIDE_CELL_COLUMN, Rewritten, rewrite
from tests.bounds_helpers import run_with_bounds
from tests.policy_fixtures import load_clinic, write_policies

EXACT = frozenset({"weight", "fee"})
WIDE = 64  # the Spark backend's wide_cells; every query below has at most this many cells

QUERIES = [
    "SELECT COUNT(*), SUM(minutes), COUNT(DISTINCT person_id) FROM visits",
    "SELECT ward, COUNT(*), SUM(minutes), COUNT(DISTINCT person_id) FROM visits GROUP BY ward",
    "SELECT ward, SUM(fee), AVG(fee), AVG(minutes) FROM visits GROUP BY ward",
    "SELECT date_trunc('month', visited) AS m, ward, COUNT(*), AVG(minutes), SUM(fee) "
    "FROM visits WHERE minutes > 5 GROUP BY 1, 2",
    "SELECT visited, COUNT(*) FROM visits WHERE visited BETWEEN '2026-03-01' AND '2026-04-30' "
    "GROUP BY visited",
    "SELECT extract(dow FROM visited), floor(minutes / 10) * 10, SUM(fee) FROM visits GROUP BY 1, 2",
    "SELECT CASE WHEN minutes < 20 THEN 'short' ELSE 'long' END AS band, ward, COUNT(*) "
    "FROM visits GROUP BY 1, 2",
    "SELECT ward, VARIANCE(minutes), STDDEV_POP(fee) FROM visits GROUP BY ward",
    "SELECT median(minutes) FROM visits WHERE minutes BETWEEN 10 AND 40",
    "SELECT ward, median(minutes) FROM visits WHERE minutes < 15 GROUP BY ward",
    "SELECT ward, SUM(minutes) FILTER (WHERE fee > 20), SUM(minutes), "
    "COUNT(*) FILTER (WHERE minutes > 30), "
    "COUNT(DISTINCT person_id) FILTER (WHERE fee > 10) FROM visits GROUP BY ward",
    "SELECT ward, AVG(CASE WHEN minutes > 30 THEN 1 ELSE 0 END), "
    "SUM(CASE WHEN fee > 40 THEN 3 ELSE -1 END) FROM visits GROUP BY ward",
]


@pytest.fixture(scope="module")
def clinic(module_dsn: str, tmp_path_factory: pytest.TempPathFactory):
    """(connection, chosen-bound policies, declared-bound policies at most_rows 4, which clips
    the heaviest individuals' 9 rows)."""
    load_clinic(module_dsn, people=600)
    chosen = load_policies(write_policies(tmp_path_factory.mktemp("chosen"), most_rows=10))
    declared = load_policies(write_policies(tmp_path_factory.mktemp("declared"), most_rows=4,
                                            bounds="declared"))
    with psycopg.connect(module_dsn) as conn:
        yield conn, chosen, declared


def both_shapes(policies, sql: str, exact: frozenset[str]) -> tuple[Rewritten, Rewritten]:
    plan = analyse(sql, policies, "tester")
    joined, wide = rewrite(plan, exact), rewrite(plan, exact, wide_cells=WIDE)
    assert WIDE_CELL_COLUMN not in joined.sql and WIDE_CELL_COLUMN in wide.sql
    assert (joined.cells, joined.bounds, joined.measure_bounds) == \
        (wide.cells, wide.bounds, wide.measure_bounds)
    return joined, wide


def rows_under_noise(conn: psycopg.Connection, rewritten: Rewritten, seed: int) -> list[tuple]:
    """The rows with each chosen bound picked by the query itself, under drawn noise."""
    draw = random.Random(seed)
    with conn.transaction():
        for j, bound in enumerate(rewritten.bounds):
            if bound.chosen:
                noise = [str(draw.randint(0, 600))] + [str(draw.randint(-40, 40))
                                                       for _ in bound.candidates]
                conn.execute("SELECT set_config(%s, %s, true)",
                             (BOUND_NOISE_SETTING.format(j), ",".join(noise)))
        return conn.execute(rewritten.sql).fetchall()


@pytest.mark.parametrize("exact", [frozenset(), EXACT], ids=["per-row", "exact"])
@pytest.mark.parametrize("sql", QUERIES, ids=[q[:60] for q in QUERIES])
def test_the_wide_shape_returns_the_joined_shape_s_rows(clinic, sql: str, exact) -> None:
    conn, chosen, declared = clinic
    joined, wide = both_shapes(chosen, sql, exact)
    ceilings = tuple(b.ceiling for b in joined.bounds)
    third = tuple(b.candidates[len(b.candidates) // 3] for b in joined.bounds)
    least = tuple(b.candidates[0] for b in joined.bounds)
    for values in (ceilings, third, least):
        expected = run_with_bounds(conn, joined, values)
        assert run_with_bounds(conn, wide, values) == expected
    clipped = [row[-1] for row in run_with_bounds(conn, joined, least)]
    assert any(clipped), "the low bounds should scale someone down"
    for seed in range(3):
        assert rows_under_noise(conn, wide, seed) == rows_under_noise(conn, joined, seed)
    joined, wide = both_shapes(declared, sql, exact)
    assert run_with_bounds(conn, wide) == run_with_bounds(conn, joined)


def test_few_enough_cells_take_the_wide_shape_and_more_the_joined_one(clinic) -> None:
    _, chosen, _ = clinic
    plan = analyse("SELECT ward, COUNT(*) FROM visits GROUP BY ward", chosen, "tester")
    assert WIDE_CELL_COLUMN in rewrite(plan, wide_cells=3).sql
    assert WIDE_CELL_COLUMN not in rewrite(plan, wide_cells=2).sql
    assert WIDE_CELL_COLUMN not in rewrite(plan).sql
    # a percentile's histogram counts its buckets as cells: 3 wards x 61 minutes
    plan = analyse("SELECT ward, median(minutes) FROM visits GROUP BY ward", chosen, "tester")
    assert rewrite(plan).cells == 183
    assert WIDE_CELL_COLUMN not in rewrite(plan, wide_cells=WIDE).sql
