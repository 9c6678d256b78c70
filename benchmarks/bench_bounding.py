"""The per-individual rewrite against the plain exact query, on a readings-like table.

    .venv/bin/python benchmarks/bench_bounding.py --backend DSN [--rows 1000000] [--repeat 7]
    .venv/bin/python benchmarks/bench_bounding.py --backend DSN --rows 10000000   # the target

Households x days of readings (50 days each, as many households as --rows asks for). For each
query it prints the median time of the plain exact query sent straight to PostgreSQL, of the
private answer with declared bounds (the ceilings: no choice), and with bounds chosen per query
(the private threshold inside the same scan), with ratios; the difference between the last two
is the private threshold's own cost. The design's target: at most 2.5x the plain query at 10M
rows. Nothing here asserts a speed.
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
from proxy.engine import Engine  # noqa: E402
from proxy.policy import load_policies  # noqa: E402

DAYS = 50
TABLE = """
table = "{name}"
source = "bench_bounding.readings"

[individual]
column = "household_id"
population = "bench_households"
most_rows = 366
bounds = "{bounds}"

[columns.household_id]
kind = "integer"
range = [1, 10000000]

[columns.district]
kind = "category"
values = ["Northbank", "Old Mill", "Harbourside"]

[columns.reading_date]
kind = "date"
range = ["2026-01-01", "2026-12-31"]
bucket = "month"

[columns.litres]
kind = "number"
range = [0, 2000]
step = 0.1
"""

CASES = [
    ("whole table: COUNT, SUM", "SELECT COUNT(*), SUM(litres) FROM {t}",
     "SELECT COUNT(*), SUM(litres) FROM bench_bounding.readings"),
    ("GROUP BY district: COUNT, SUM", "SELECT district, COUNT(*), SUM(litres) FROM {t} GROUP BY district",
     "SELECT district, COUNT(*), SUM(litres) FROM bench_bounding.readings GROUP BY district"),
    ("GROUP BY month: SUM", "SELECT date_trunc('month', reading_date) AS m, SUM(litres) FROM {t} GROUP BY 1",
     "SELECT date_trunc('month', reading_date), SUM(litres) FROM bench_bounding.readings GROUP BY 1"),
]



def load(dsn: str, rows: int) -> None:
    households = max(1, rows // DAYS)
    with psycopg.connect(dsn, autocommit=True) as conn:
        conn.execute("DROP SCHEMA IF EXISTS bench_bounding CASCADE; CREATE SCHEMA bench_bounding")
        conn.execute(
            "CREATE TABLE bench_bounding.readings AS SELECT h AS household_id, "
            "(ARRAY['Northbank','Old Mill','Harbourside'])[1 + h %% 3] AS district, "
            "DATE '2026-03-01' + d AS reading_date, "
            "round((random() * 600 + (h %% 7) * 40)::numeric, 1)::numeric(7,1) AS litres "
            "FROM generate_series(1, %s) h, generate_series(0, %s) d", (households, DAYS - 1))
        conn.execute("ANALYZE bench_bounding.readings")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--backend", required=True)
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--repeat", type=int, default=7)
    parser.add_argument("--keep", action="store_true", help="reuse a table loaded before")
    args = parser.parse_args()
    console = Console()
    if not args.keep:
        with console.status(f"loading {args.rows:,} readings"):
            load(args.backend, args.rows)
    with tempfile.TemporaryDirectory() as folder:
        target = generous_policies(Path(folder))
        for name, bounds in (("chosen_bounds", "chosen"), ("declared_bounds", "declared")):
            (target / "tables" / f"{name}.toml").write_text(TABLE.format(name=name, bounds=bounds))
        access = target / "access.toml"
        access.write_text(access.read_text().replace(
            'tables = ["households", "readings", "tariffs"]',
            'tables = ["households", "readings", "tariffs", "chosen_bounds", "declared_bounds"]', 1))
        engine = Engine.connect(load_policies(target), args.backend, pool_size=2)
        table = Table("query", "plain ms", "declared ms", "ratio", "chosen ms", "ratio",
                      "threshold's cost")
        try:
            with psycopg.connect(args.backend, autocommit=True) as direct:
                for label, private_sql, plain_sql in CASES:
                    plain = median_ms(lambda: direct.execute(plain_sql).fetchall(), args.repeat)
                    found = {}
                    for name in ("declared_bounds", "chosen_bounds"):
                        sql = private_sql.format(t=name)
                        found[name] = median_ms(
                            lambda: engine.answer("planner", sql, epsilon=Decimal(1), fresh=True), args.repeat)
                    declared, chosen = found["declared_bounds"], found["chosen_bounds"]
                    table.add_row(label, f"{plain:.0f}", f"{declared:.0f}", f"{declared / plain:.2f}",
                                  f"{chosen:.0f}", f"{chosen / plain:.2f}",
                                  f"{(chosen - declared) / plain:+.2f}x")
        finally:
            engine.close()
        console.print(f"{args.rows:,} rows ({args.rows // DAYS:,} households x {DAYS} days)")
        console.print(table)
    return 0


if __name__ == "__main__":
    sys.exit(main())
