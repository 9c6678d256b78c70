"""VARIANCE/STDDEV and percentiles on the demo's invented water-utility data (300 households, a
year of daily readings): the stated 95% bounds hold PostgreSQL's exact answers as often as they
claim, and percentiles land near PostgreSQL's percentile_cont.

Outside reference: PostgreSQL's var_samp, stddev_samp and percentile_cont on the same rows.
"""

from __future__ import annotations

import math
from decimal import Decimal
from fractions import Fraction
from pathlib import Path

import psycopg
import pytest

from proxy import noise, selection, spread
from proxy.backend import Backend
from proxy.demo import load_scenario
from proxy.engine import Engine, epsilon_split
from proxy.ledger import Ledger
from proxy.policy import load_policies
from proxy.sql.analyse import analyse
from proxy.sql.rewrite import rewrite
from tests.bounds_helpers import run_with_bounds

POLICIES = Path(__file__).resolve().parent.parent / "policies"
HOUSEHOLDS = 300
DISTRICTS = ("Northbank", "Old Mill", "Harbourside")


@pytest.fixture(scope="module")
def demo(module_dsn: str):
    load_scenario(module_dsn, households=HOUSEHOLDS, progress=False)
    return module_dsn, load_policies(POLICIES)


def exact(dsn: str, sql: str) -> list[tuple]:
    with psycopg.connect(dsn) as conn:
        return conn.execute(sql).fetchall()


def test_litres_spread_bound_covers_postgresql(demo) -> None:
    """Per district, the variance of a week's daily litres: the noise-free parts at the
    smallest candidate row bound of at least 7 (no household has more readings in a week, so
    nothing is clipped and the parts are PostgreSQL's), with noise drawn as the engine draws it
    at epsilon 1; the stated range holds PostgreSQL's var_samp in at least 95% of 400 answers per
    district (allowing 3 binomial standard deviations: >= 92.0%; an answer without a divisor
    counts as a miss)."""
    dsn, policies = demo
    week = "reading_date BETWEEN '2026-03-02' AND '2026-03-08'"
    plan = analyse(f"SELECT district, VARIANCE(litres) FROM readings WHERE {week} "
                   "GROUP BY district", policies, "planner")
    rewritten = rewrite(plan)
    (rows_bound,) = rewritten.bounds
    values = (min(c for c in rows_bound.candidates if c >= 7),)
    with psycopg.connect(dsn, autocommit=True) as conn:
        rows = run_with_bounds(conn, rewritten, values)
    split = epsilon_split(plan, rewritten, Decimal("1"))
    scales = tuple(Fraction(s) / Fraction(split.measure) for s in rewritten.sensitivities(values))
    widths = spread.widths(scales)  # type: ignore[arg-type]
    cap = spread.largest_variance(0, 20000)
    truth = dict(exact(dsn, "SELECT district, var_samp(CASE WHEN litres > 2000 THEN 2000 "
                            "WHEN litres < 0 THEN 0 ELSE litres END) FROM utility.meter_readings "
                            f"WHERE {week} GROUP BY district"))
    trials = 400
    for district, row in zip(DISTRICTS, rows):
        parts = [int(v) for v in row[1:4]]
        draws = [noise.sample_discrete_laplace(scale, trials) for scale in scales]
        held = 0
        for z in zip(*draws):
            noisy = [p + int(d) for p, d in zip(parts, z)]
            estimate = spread.variance(*noisy, True, cap)
            if estimate is None:
                continue
            span = spread.variance_range(*noisy, widths, True, cap)
            half = spread.half_width(estimate, span, False) * 0.01  # step 0.1 litres, squared
            held += abs(float(estimate) * 0.01 - float(truth[district])) <= half + 1e-6
        assert held / trials >= 0.92, (district, held)


def test_engine_answers_hold_postgresql_within_their_bound(demo, request) -> None:
    """20 real answers of STDDEV(occupants) per district at epsilon 0.1: the stated 95% range
    holds PostgreSQL's stddev_samp in at least 16 of each 20 (for a true coverage of 95%,
    fewer than 16 happens with probability 0.3%: binomial)."""
    dsn, policies = demo
    engine = Engine(policies, Backend(dsn, pool_size=2), Ledger(dsn, schema="ledger_spread_demo"))
    truth = dict(exact(dsn, "SELECT district, stddev_samp(LEAST(GREATEST(occupants, 1), 8)) "
                            "FROM utility.households GROUP BY district"))
    held = dict.fromkeys(DISTRICTS, 0)
    try:
        for _ in range(20):
            # fresh: 20 independent answers (the same question would get its stored answer)
            answer = engine.answer("planner", "SELECT district, STDDEV(occupants) FROM households "
                                              "GROUP BY district", epsilon=Decimal("0.1"),
                                   fresh=True)
            bound = float(answer.accuracy[0].bound95)
            for district, value in answer.rows:
                held[district] += value is not None and abs(value - float(truth[district])) <= bound
    finally:
        engine.close()
    assert all(count >= 16 for count in held.values()), held


def test_litres_median_near_postgresql(demo) -> None:
    """The median of the daily litres over all households (chosen row bound, cumulative
    thinning) lands where PostgreSQL ranks it within the stated rank bound, re-expressed in
    households: each household's thinned rows weigh alike (one bound for all, ~365 rows each),
    so a rank error of N thinned rows out of n' is the share N / n' <= N / (R * H) of the
    households' rows, and R >= 1 gives the share at most rank_bound(R = 1) / H."""
    dsn, policies = demo
    engine = Engine(policies, Backend(dsn, pool_size=2), Ledger(dsn, schema="ledger_median_demo"))
    try:
        answer = engine.answer("planner", "SELECT median(litres) AS m FROM readings",
                               epsilon=Decimal("1"))
    finally:
        engine.close()
    (value,), = answer.rows
    (below, through, n), = exact(dsn, f"SELECT count(*) FILTER (WHERE litres < {value}), "
                                      f"count(*) FILTER (WHERE litres <= {value}), count(*) "
                                      "FROM utility.meter_readings WHERE litres BETWEEN 0 AND 2000")
    share = selection.rank_bound95(20001, Fraction(85, 100), 1) / HOUSEHOLDS
    assert below / n - share <= 0.5 <= through / n + share, (value, below, through, n)
    (pg_median,), = exact(dsn, "SELECT percentile_cont(0.5) WITHIN GROUP (ORDER BY litres) "
                               "FROM utility.meter_readings")
    print(f"median litres: answer {value}, PostgreSQL {pg_median}, stated share ±{share:.3f}")
