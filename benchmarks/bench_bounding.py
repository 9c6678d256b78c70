"""The per-individual rewrite against the plain exact query, on a demo-shaped readings table.

    .venv/bin/python benchmarks/bench_bounding.py --backend DSN                 # 1M and 10M rows
    .venv/bin/python benchmarks/bench_bounding.py --backend DSN --rows 1000000 --repeat 7
    .venv/bin/python benchmarks/bench_bounding.py --backend DSN --keep --set max_parallel_workers_per_gather=0

The table has the demo's shape (one row per household per day of 2026, the district on every
row, litres as numeric(7,1), primary key (household_id, reading_date)), generated in SQL with
generate_series: ``rows // 365`` households x 365 days, in schema ``bench_bounding_<rows>`` of
the DSN's database. For each query shape it prints the median time of the plain exact query
sent straight to PostgreSQL, of the private answer (through the engine: analysis, rewrite,
ledger charge, backend query, noise) with declared bounds (the ceilings: no choice) and with
bounds chosen per query (the private threshold inside the same scan), with their ratios to the
plain query; the difference between the last two is the private threshold's own cost. The last
column is the plain query grouped by household too, counted in the database: the partials any
per-individual answer has to compute, so a floor for the rewrite's ratio. ``--set``
applies session settings to both sides alike (a DSN ``options``), so a comparison without
parallel workers is as fair as one with them; the engine's backend connections then apply the
proxy's own ``proxy.backend.BACKEND_SETTINGS`` on top (printed). The target: at most 2.5x the plain query at 10M
rows. Nothing here asserts a speed; run it on a quiet machine, or read ratios, not times.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
from decimal import Decimal
from pathlib import Path

import psycopg
from psycopg.conninfo import conninfo_to_dict, make_conninfo
from rich.console import Console
from rich.table import Table

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.common import generous_policies, median_ms  # noqa: E402
from proxy.backend import BACKEND_SETTINGS  # noqa: E402
from proxy.engine import Engine  # noqa: E402
from proxy.policy import load_policies  # noqa: E402

DAYS = 365  # 2026
TIMEOUT_MS = 600_000
TABLE = """
table = "{name}"
source = "{source}"

[individual]
column = "household_id"
population = "bench_households"
most_rows = 366
bounds = "{bounds}"

[columns.household_id]
kind = "integer"
range = [100000, 199999]

[columns.district]
kind = "category"
values = ["Northbank", "Old Mill", "Harbourside"]

[columns.reading_date]
kind = "date"
range = ["2026-01-01", "2026-12-31"]

[columns.litres]
kind = "number"
range = [0, 2000]
step = 0.1
"""

# (label, private query over {t}, the plain exact query over {source}, its GROUP BY clause)
CASES = [
    ("whole table: COUNT, SUM", "SELECT COUNT(*), SUM(litres) FROM {t}",
     "SELECT COUNT(*), SUM(litres) FROM {source}", ""),
    ("GROUP BY district: COUNT, SUM",
     "SELECT district, COUNT(*), SUM(litres) FROM {t} GROUP BY district",
     "SELECT district, COUNT(*), SUM(litres) FROM {source}", "district"),
    ("GROUP BY month: SUM",
     "SELECT date_trunc('month', reading_date) AS m, SUM(litres) FROM {t} GROUP BY 1",
     "SELECT date_trunc('month', reading_date), SUM(litres) FROM {source}",
     "date_trunc('month', reading_date)"),
    ("GROUP BY day: SUM", "SELECT reading_date, SUM(litres) FROM {t} GROUP BY reading_date",
     "SELECT reading_date, SUM(litres) FROM {source}", "reading_date"),
]


def plain_queries(select: str, keys: str, source: str) -> tuple[str, str]:
    """The plain query, and the same grouped by household too (what any per-individual answer
    must at least compute: the partials), counted in the database so no rows travel; counting
    whole rows keeps PostgreSQL from dropping the unused aggregates."""
    plain = select.format(source=source) + (f" GROUP BY {keys}" if keys else "")
    floor = select.format(source=source) + f" GROUP BY household_id{', ' + keys if keys else ''}"
    return plain, f"SELECT count(partials) FROM ({floor}) AS partials"  # whole rows: no column left out


def schema_of(rows: int) -> str:
    return f"bench_bounding_{rows}"


def load(dsn: str, rows: int) -> None:
    """(Re)create ``schema_of(rows).readings``: rows // 365 households x 365 days, in SQL."""
    schema = schema_of(rows)
    households = max(1, rows // DAYS)
    with psycopg.connect(dsn, autocommit=True) as conn:
        conn.execute(f"DROP SCHEMA IF EXISTS {schema} CASCADE")
        conn.execute(f"CREATE SCHEMA {schema}")
        conn.execute(
            f"CREATE TABLE {schema}.readings AS SELECT 100000 + h AS household_id, "
            "(ARRAY['Northbank','Old Mill','Harbourside'])[1 + h %% 3] AS district, "
            "DATE '2026-01-01' + d AS reading_date, "
            "round((random() * 600 + (h %% 7) * 40)::numeric, 1)::numeric(7,1) AS litres "
            "FROM generate_series(1, %s) h, generate_series(0, %s) d", (households, DAYS - 1))
        conn.execute(f"ALTER TABLE {schema}.readings ADD PRIMARY KEY (household_id, reading_date)")
        conn.execute(f"VACUUM ANALYZE {schema}.readings")


def with_settings(dsn: str, settings: list[str]) -> str:
    """``dsn`` with ``-c name=value`` options added, so every session on it starts with them."""
    if not settings:
        return dsn
    options = conninfo_to_dict(dsn).get("options") or ""
    extra = " ".join(f"-c {item}" for item in settings)
    return make_conninfo(dsn, options=f"{options} {extra}".strip())


def shown_settings(dsn: str) -> str:
    names = ("work_mem", "hash_mem_multiplier", "max_parallel_workers_per_gather", "jit")
    with psycopg.connect(dsn, autocommit=True) as conn:
        return ", ".join(f"{n}={conn.execute(f'SHOW {n}').fetchone()[0]}" for n in names)


def bench(console: Console, dsn: str, rows: int, repeat: int, only: list[str]) -> None:
    schema = schema_of(rows)
    source = f"{schema}.readings"
    with tempfile.TemporaryDirectory() as folder:
        target = generous_policies(Path(folder))
        for name, bounds in (("chosen_bounds", "chosen"), ("declared_bounds", "declared")):
            (target / "tables" / f"{name}.toml").write_text(
                TABLE.format(name=name, bounds=bounds, source=source))
        access = target / "access.toml"
        # The slowest shapes at 10M rows on a loaded machine run past the demo's one minute.
        access.write_text(access.read_text().replace(
            'tables = ["households", "readings", "tariffs"]',
            'tables = ["households", "readings", "tariffs", "chosen_bounds", "declared_bounds"]',
            1).replace(
            "query_timeout_ms = 60000", f"query_timeout_ms = {TIMEOUT_MS}", 1))
        engine = Engine.connect(load_policies(target), dsn, pool_size=2)
        table = Table("query", "plain ms", "declared ms", "ratio", "chosen ms", "ratio",
                      "threshold's cost", "per-household ratio")
        try:
            with psycopg.connect(dsn, autocommit=True) as direct:
                for label, private_sql, plain_sql, keys in CASES:
                    if only and not any(part in label for part in only):
                        continue
                    plain_text, floor_text = plain_queries(plain_sql, keys, source)
                    plain = median_ms(lambda: direct.execute(plain_text).fetchall(), repeat, 1)
                    floor = median_ms(lambda: direct.execute(floor_text).fetchall(), repeat, 1)
                    found = {}
                    for name in ("declared_bounds", "chosen_bounds"):
                        sql = private_sql.format(t=name)
                        found[name] = median_ms(
                            lambda: engine.answer("planner", sql, epsilon=Decimal(1), fresh=True), repeat, 1)
                    declared, chosen = found["declared_bounds"], found["chosen_bounds"]
                    table.add_row(label, f"{plain:.0f}", f"{declared:.0f}", f"{declared / plain:.2f}",
                                  f"{chosen:.0f}", f"{chosen / plain:.2f}",
                                  f"{(chosen - declared) / plain:+.2f}x", f"{floor / plain:.2f}")
        finally:
            engine.close()
    console.print(f"{rows:,} rows ({rows // DAYS:,} households x {DAYS} days), "
                  f"load average {' '.join(f'{x:.1f}' for x in os.getloadavg())}")
    console.print(table)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--backend", required=True)
    parser.add_argument("--rows", type=int, nargs="+", default=[1_000_000, 10_000_000])
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--keep", action="store_true", help="reuse tables loaded before")
    parser.add_argument("--set", action="append", default=[], metavar="NAME=VALUE",
                        help="a session setting for both sides (repeatable)")
    parser.add_argument("--only", action="append", default=[], metavar="TEXT",
                        help="only the query shapes whose label holds TEXT (repeatable)")
    args = parser.parse_args()
    console = Console()
    dsn = with_settings(args.backend, args.set)
    console.print(f"settings on both sides: {shown_settings(dsn)}; the engine's backend "
                  f"connections then set {', '.join(f'{k}={v}' for k, v in BACKEND_SETTINGS.items())}")
    for rows in args.rows:
        if not args.keep:
            with console.status(f"loading {rows:,} readings"):
                load(args.backend, rows)
        bench(console, dsn, rows, args.repeat, args.only)
    return 0


if __name__ == "__main__":
    sys.exit(main())
