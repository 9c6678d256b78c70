"""Joins that keep the protected unit against the plain exact join, on the demo scenario.

    .venv/bin/python benchmarks/bench_joins.py --backend DSN [--households 3000] [--repeat 5]

Loads the invented water utility (``proxy.demo.load_scenario``: a year of daily readings per
household) into the backend database, then prints for each query the median time of the plain
exact query sent straight to PostgreSQL, of the private answer through the engine (bounds
chosen per query, as the demo's policies say), and their ratio. A one-table query of the same
size is measured alongside, so the join's own cost reads as the difference of the two ratios.
Nothing here asserts a speed.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from decimal import Decimal
from pathlib import Path

import psycopg
from rich.console import Console
from rich.table import Table

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.common import generous_policies, median_ms  # noqa: E402
from proxy.demo import load_scenario  # noqa: E402
from proxy.engine import Engine  # noqa: E402
from proxy.policy import load_policies  # noqa: E402

# (label, the analyst's query, the plain exact query on the backend)
CASES = [
    ("one table: AVG per district",
     "SELECT district, AVG(litres) FROM readings GROUP BY district",
     "SELECT district, AVG(litres) FROM utility.meter_readings GROUP BY district"),
    ("join households: AVG per tariff",
     "SELECT h.tariff, AVG(r.litres) FROM readings r JOIN households h "
     "ON h.household_id = r.household_id GROUP BY h.tariff",
     "SELECT h.tariff, AVG(r.litres) FROM utility.meter_readings r JOIN utility.households h "
     "ON h.household_id = r.household_id GROUP BY h.tariff"),
    ("join households and public tariffs",
     "SELECT h.district, SUM(r.litres) FROM readings r JOIN households h "
     "ON h.household_id = r.household_id JOIN tariffs t ON t.tariff = h.tariff "
     "WHERE t.price_per_m3 < 2 GROUP BY h.district",
     "SELECT h.district, SUM(r.litres) FROM utility.meter_readings r JOIN utility.households h "
     "ON h.household_id = r.household_id JOIN utility.tariffs t ON t.tariff = h.tariff "
     "WHERE t.price_per_m3 < 2 GROUP BY h.district"),
    ("semi-join: households with a garden",
     "SELECT district, COUNT(*) FROM readings WHERE household_id IN "
     "(SELECT household_id FROM households WHERE has_garden) GROUP BY district",
     "SELECT district, COUNT(*) FROM utility.meter_readings WHERE household_id IN "
     "(SELECT household_id FROM utility.households WHERE has_garden) GROUP BY district"),
]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--backend", required=True)
    parser.add_argument("--households", type=int, default=3000)
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--keep", action="store_true", help="reuse a scenario loaded before")
    args = parser.parse_args()
    console = Console()
    if not args.keep:
        counts = load_scenario(args.backend, households=args.households, progress=False)
        console.print(f"{counts['households']:,} households, {counts['readings']:,} readings")
    with tempfile.TemporaryDirectory() as folder:
        engine = Engine.connect(load_policies(generous_policies(Path(folder))), args.backend,
                                pool_size=2)
        table = Table("query", "plain ms", "private ms", "ratio")
        try:
            with psycopg.connect(args.backend, autocommit=True) as direct:
                for label, private_sql, plain_sql in CASES:
                    plain = median_ms(lambda: direct.execute(plain_sql).fetchall(), args.repeat)
                    private = median_ms(
                        lambda: engine.answer("planner", private_sql, epsilon=Decimal(1)),
                        args.repeat)
                    table.add_row(label, f"{plain:.0f}", f"{private:.0f}", f"{private / plain:.2f}")
        finally:
            engine.close()
        console.print(table)
    return 0


if __name__ == "__main__":
    sys.exit(main())
