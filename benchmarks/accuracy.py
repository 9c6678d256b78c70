"""Accuracy of answers on the demo scenario against the plain SQL answer, on real PostgreSQL.

For each query, runs the real engine path (plan, reserve, backend, noise, release) ``--runs``
times at one epsilon and reports, over all answers and cells:
- the 95th percentile of the relative error |answer - plain| / |plain|;
- coverage: how often the range the answer states, ``[value - bound95 - high_by,
  value + bound95 + low_by]``, holds the plain SQL answer (the design asks for at least 90%);
- the stated 95% bound (its median over answers) against the measured 95th percentile of
  |answer - plain|, pooled over cells; and, since one bound per column covers every cell (it is
  the widest cell's), the same ratio at the cell where it is smallest (the cell that sets it).

    .venv/bin/python benchmarks/accuracy.py --backend postgresql://.../db [--load] [--runs 60]
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
from decimal import Decimal
from pathlib import Path

import psycopg

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.common import generous_policies  # noqa: E402
from proxy.demo import load_scenario  # noqa: E402
from proxy.engine import Engine  # noqa: E402
from proxy.policy import load_policies  # noqa: E402

# label, hushql query, plain query, the target for the 95th percentile of the relative
# error (None: no target, shown for information).
QUERIES = [
    ("whole count", "SELECT COUNT(*) FROM readings",
     "SELECT COUNT(*) FROM utility.meter_readings", 0.01),
    ("whole sum", "SELECT SUM(litres) FROM readings",
     "SELECT SUM(litres) FROM utility.meter_readings", 0.01),
    ("monthly count", "SELECT date_trunc('month', reading_date) AS m, COUNT(*) FROM readings GROUP BY 1",
     "SELECT date_trunc('month', reading_date)::date, COUNT(*) FROM utility.meter_readings GROUP BY 1 ORDER BY 1",
     0.05),
    ("monthly sum", "SELECT date_trunc('month', reading_date) AS m, SUM(litres) FROM readings GROUP BY 1",
     "SELECT date_trunc('month', reading_date)::date, SUM(litres) FROM utility.meter_readings GROUP BY 1 ORDER BY 1",
     0.05),
    ("district count", "SELECT district, COUNT(*) FROM readings GROUP BY district",
     "SELECT district, COUNT(*) FROM utility.meter_readings GROUP BY 1", 0.05),
    ("district sum", "SELECT district, SUM(litres) FROM readings GROUP BY district",
     "SELECT district, SUM(litres) FROM utility.meter_readings GROUP BY 1", 0.05),
    ("district avg (readings)", "SELECT district, AVG(litres) FROM readings GROUP BY district",
     "SELECT district, AVG(litres) FROM utility.meter_readings GROUP BY 1", 0.05),
    ("district avg (households)", "SELECT district, AVG(occupants) FROM households GROUP BY district",
     "SELECT district, AVG(occupants) FROM utility.households GROUP BY 1", 0.05),
    ("tariff avg (households)", "SELECT tariff, AVG(occupants) FROM households GROUP BY tariff",
     "SELECT tariff, AVG(occupants) FROM utility.households GROUP BY 1", 0.05),
    # A one-row-per-household cell each day: households scaled below 1 must not vanish.
    ("daily count", "SELECT reading_date, COUNT(*) FROM readings GROUP BY reading_date",
     "SELECT reading_date, COUNT(*) FROM utility.meter_readings GROUP BY 1", None),
]


def measure(engine: Engine, plain: dict, sql: str, runs: int, epsilon: Decimal) -> dict:
    """Relative errors, coverage and (for AVG) stated/measured bound over ``runs`` answers."""
    errors, absolute, covered, total, stated = [], [], 0, 0, []
    per_cell: dict = {}  # key -> (absolute errors, stated bounds)
    for _ in range(runs):
        answer = engine.answer("planner", sql, epsilon=epsilon, fresh=True)  # new noise each run
        accuracy = answer.accuracy[0]
        for row in answer.rows:
            key, value = (row[0], row[-1]) if len(row) > 1 else (None, row[0])
            truth = float(plain[key if not hasattr(key, "isoformat") else key])
            if value is None:
                continue
            value = float(value)
            errors.append(abs(value - truth) / abs(truth))
            absolute.append(abs(value - truth))
            low = value - float(accuracy.bound95) - float(accuracy.high_by or 0)
            high = value + float(accuracy.bound95) + float(accuracy.low_by or 0)
            covered += low <= truth <= high
            total += 1
            stated.append(float(accuracy.bound95))
            cell = per_cell.setdefault(key, ([], []))
            cell[0].append(abs(value - truth))
            cell[1].append(float(accuracy.bound95))
    errors.sort()
    p95 = _p95(absolute)
    ratios = [statistics.median(bounds) / _p95(found) for found, bounds in per_cell.values()
              if _p95(found)]
    return {"p95_relative": errors[int(0.95 * (len(errors) - 1))], "coverage": covered / total,
            "stated_over_measured": statistics.median(stated) / p95 if p95 else float("nan"),
            "tightest_cell": min(ratios, default=float("nan"))}


def _p95(values: list[float]) -> float:
    ordered = sorted(values)
    return ordered[int(0.95 * (len(ordered) - 1))]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--backend", required=True, help="database DSN for the demo tables")
    parser.add_argument("--load", action="store_true", help="load the demo scenario first")
    parser.add_argument("--runs", type=int, default=60)
    parser.add_argument("--epsilon", default="1")
    parser.add_argument("--only", default="", help="run queries whose label contains this")
    args = parser.parse_args()
    if args.load:
        load_scenario(args.backend)
    with tempfile.TemporaryDirectory() as folder:
        policies = load_policies(generous_policies(Path(folder)))
        engine = Engine.connect(policies, args.backend, args.backend)
        try:
            with psycopg.connect(args.backend) as conn:
                print(f"{'query':28} {'p95 rel. error':>15} {'target':>7} {'coverage':>9} "
                      f"{'stated/measured':>16} {'(tightest cell)':>16}  "
                      "(coverage target 90%; AVG stated/measured <= 1.5)")
                for label, sql, plain_sql, target in QUERIES:
                    if args.only not in label:
                        continue
                    rows = conn.execute(plain_sql).fetchall()
                    plain = {(r[0] if len(r) > 1 else None): r[-1] for r in rows}
                    found = measure(engine, plain, sql, args.runs, Decimal(args.epsilon))
                    verdict = "" if target is None else \
                        ("met" if found["p95_relative"] <= target else "MISSED")
                    shown = "-" if target is None else f"{target:.0%}"
                    print(f"{label:28} {found['p95_relative']:>14.3%} {shown:>7} "
                          f"{found['coverage']:>9.1%} {found['stated_over_measured']:>16.2f} "
                          f"{found['tightest_cell']:>16.2f}  {verdict}", flush=True)
        finally:
            engine.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
