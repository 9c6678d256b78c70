"""The range each answer states holds the plain SQL answer at least 90% of the time.

An answer's stated range is ``[value - bound95 - high_by, value + bound95 + low_by]``: the noise
bound (95%) widened by the noisy figure of what the contribution bounds clipped away (95%), so
by the union bound it should hold the plain SQL answer (computed by PostgreSQL on the raw rows)
in at least 90% of answers. Checked on a small run of the demo scenario (300 households, a year
of readings) through the real engine, at epsilon 1, for whole-table, monthly and per-district
answers. With n range checks, an observed share below ``0.9 - 3 * sqrt(0.09 / n)`` would be
evidence against the claim (binomial, three standard deviations: common practice). The
companion shows the check fails for ranges that ignore clipping and halve the noise bound.
"""

from __future__ import annotations

import math
import tempfile
from decimal import Decimal
from pathlib import Path

import psycopg
import pytest

from benchmarks.common import generous_policies
from proxy.demo import load_scenario
from proxy.engine import Engine
from proxy.policy import load_policies

pytestmark = pytest.mark.slow

RUNS = 30
QUERIES = [
    ("SELECT SUM(litres) FROM readings", "SELECT NULL, SUM(litres) FROM utility.meter_readings"),
    ("SELECT COUNT(*) FROM readings", "SELECT NULL, COUNT(*) FROM utility.meter_readings"),
    ("SELECT date_trunc('month', reading_date) AS m, SUM(litres) FROM readings GROUP BY 1",
     "SELECT date_trunc('month', reading_date)::date, SUM(litres) FROM utility.meter_readings "
     "GROUP BY 1"),
    ("SELECT district, AVG(litres) FROM readings GROUP BY district",
     "SELECT district, AVG(litres) FROM utility.meter_readings GROUP BY 1"),
    # Centred averages (households: one row each, declared bounds).
    ("SELECT district, AVG(occupants) FROM households GROUP BY district",
     "SELECT district, AVG(occupants) FROM utility.households GROUP BY 1"),
    ("SELECT tariff, AVG(occupants) FROM households GROUP BY tariff",
     "SELECT tariff, AVG(occupants) FROM utility.households GROUP BY 1"),
    # One row per household in each of 365 cells: households scaled below 1 keep their share.
    ("SELECT reading_date, COUNT(*) FROM readings GROUP BY reading_date",
     "SELECT reading_date, COUNT(*) FROM utility.meter_readings GROUP BY 1"),
]


@pytest.fixture(scope="module")
def answers(module_dsn: str):
    """(value, accuracy, plain answer) for every cell of RUNS answers to each query."""
    load_scenario(module_dsn, households=300, progress=False)
    found = []
    with tempfile.TemporaryDirectory() as folder:
        policies = load_policies(generous_policies(Path(folder)))
        engine = Engine.connect(policies, module_dsn, pool_size=2)
        try:
            with psycopg.connect(module_dsn) as conn:
                for sql, plain_sql in QUERIES:
                    plain = {key: float(value) for key, value in conn.execute(plain_sql).fetchall()}
                    for _ in range(RUNS):
                        answer = engine.answer("planner", sql, epsilon=Decimal(1), fresh=True)
                        for row in answer.rows:
                            key = row[0] if len(row) > 1 else None
                            if row[-1] is not None:
                                found.append((float(row[-1]), answer.accuracy[0], plain[key], sql))
        finally:
            engine.close()
    return found


def _coverage(answers, widen_clipping: bool, noise_share: float) -> float:
    held = 0
    for value, accuracy, plain, _ in answers:
        noise = float(accuracy.bound95) * noise_share
        low = value - noise - (float(accuracy.high_by or 0) if widen_clipping else 0)
        high = value + noise + (float(accuracy.low_by or 0) if widen_clipping else 0)
        held += low <= plain <= high
    return held / len(answers)


def _floor(n: int) -> float:
    return 0.9 - 3 * math.sqrt(0.09 / n)


def test_stated_ranges_hold_the_plain_answer(answers) -> None:
    assert _coverage(answers, widen_clipping=True, noise_share=1.0) >= _floor(len(answers))


@pytest.mark.parametrize("sql", [q[0] for q in QUERIES])
def test_stated_ranges_hold_the_plain_answer_for_each_query(answers, sql: str) -> None:
    own = [a for a in answers if a[3] == sql]
    assert _coverage(own, widen_clipping=True, noise_share=1.0) >= _floor(len(own))


def test_the_check_fails_for_ranges_too_narrow(answers) -> None:
    assert _coverage(answers, widen_clipping=False, noise_share=0.5) < _floor(len(answers))
