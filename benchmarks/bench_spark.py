"""hushql on Apache Spark against the same exact queries sent straight to Spark, in one run.

    .venv/bin/python benchmarks/bench_spark.py --backend sc://HOST:PORT \\
        --ledger postgresql://... [--households 3000] [--repeat 5] [--no-load]

Loads the demo scenario into Spark (``--households`` x 365 readings: 27,400 households make
10M readings), then times, as medians of ``--repeat`` runs, a row table (households by
district), a per-individual table (readings by district) and a monthly breakdown (readings by
month), each answered by hushql's engine (plan cached, ledger charge, noise) and sent as plain
exact SQL to the same Spark session. Prints the ratios. Nothing here asserts a speed.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from decimal import Decimal
from pathlib import Path

from rich.console import Console
from rich.table import Table

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.common import generous_policies  # noqa: E402
from proxy.engine import Engine  # noqa: E402
from proxy.policy import load_policies  # noqa: E402
from proxy.spark_demo import load_scenario_into_spark  # noqa: E402

# (label, analyst SQL, the same question as plain exact Spark SQL)
QUERIES = [
    ("row table: households by district",
     "SELECT district, COUNT(*) FROM households GROUP BY district",
     "SELECT district, count(*) FROM utility.households GROUP BY district"),
    ("per household: litres by district",
     "SELECT district, SUM(litres) FROM readings GROUP BY district",
     "SELECT district, sum(litres) FROM utility.meter_readings GROUP BY district"),
    ("per household: litres by month",
     "SELECT date_trunc('month', reading_date) AS m, SUM(litres) FROM readings GROUP BY 1",
     "SELECT date_trunc('month', reading_date), sum(litres) FROM utility.meter_readings GROUP BY 1"),
]


def median_seconds(run, repeat: int) -> float:
    run()  # warm-up: plans, caches, the JIT
    times = []
    for _ in range(repeat):
        started = time.perf_counter()
        run()
        times.append(time.perf_counter() - started)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--backend", required=True, help="sc://HOST:PORT")
    parser.add_argument("--ledger", required=True, help="PostgreSQL DSN for the ledger")
    parser.add_argument("--households", type=int, default=3000)
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--no-load", action="store_true", help="use the tables already loaded")
    args = parser.parse_args()
    if not args.no_load:
        load_scenario_into_spark(args.backend, households=args.households)
    with tempfile.TemporaryDirectory() as folder:
        policies = load_policies(generous_policies(Path(folder)))
        engine = Engine.connect(policies, args.backend, args.ledger)
        try:
            table = Table("query", "plain Spark (s)", "hushql (s)", "ratio")
            session = engine.backend._session  # type: ignore[union-attr]
            for label, analyst_sql, plain_sql in QUERIES:
                plain = median_seconds(lambda: session.sql(plain_sql).collect(), args.repeat)
                hushql = median_seconds(lambda: engine.answer(
                    "planner", analyst_sql, epsilon=Decimal("0.1"), fresh=True), args.repeat)
                table.add_row(label, f"{plain:.3f}", f"{hushql:.3f}", f"{hushql / plain:.2f}x")
            Console().print(table)
        finally:
            engine.close()


if __name__ == "__main__":
    main()
