"""hushql on Apache Spark against the same exact queries sent straight to Spark, in one run.

    .venv/bin/python benchmarks/bench_spark.py --backend sc://HOST:PORT \\
        --ledger postgresql://... [--households 27400] [--repeat 3] [--no-load]

Writes readings-shaped tables into Spark as Parquet, generated inside Spark (``range``), never
row by row from Python: ``--households`` households with 365 daily readings each (27,400 make
10,001,000 readings). Then times, as medians of ``--repeat`` runs after a warm-up,

- a row table: the readings as a table protected per row (no ``[individual]``), counted and
  summed by district;
- a per-individual table: the readings protected per household (the demo's policy, bounds
  chosen per query), litres by district;
- a monthly breakdown of the same per-household table;

each answered by hushql's engine (plan cached, ledger charge in PostgreSQL, noise) and sent as
the plain exact SQL to the same Spark session. Prints the session's settings that shape both
sides' plans, the load average before and after, medians, ratios and the cost per row.
Nothing here asserts a speed. ``--explain`` prints Spark's plan of hushql's per-individual
query (``EXPLAIN FORMATTED``), to see where its time goes.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from decimal import Decimal
from pathlib import Path

from rich.console import Console
from rich.table import Table

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.common import generous_policies, median_ms  # noqa: E402
from proxy.demo import DAYS, DISTRICTS, SCHEMA, TARIFFS, YEAR  # noqa: E402
from proxy.engine import Engine  # noqa: E402
from proxy.policy import load_policies  # noqa: E402

FIRST_ACCOUNT = 100000  # the policies' household_id range starts here


def _pick(values: tuple[str, ...], seed: int, index: str) -> str:
    """A Spark SQL expression choosing one of ``values`` per ``index``, pseudo-randomly."""
    listed = ", ".join(f"'{v}'" for v in values)
    return f"element_at(array({listed}), CAST(pmod(hash({index}, {seed}), {len(values)}) + 1 AS INT))"


# The households (index h = 0..n-1) and their readings (index id = h * DAYS + day), written as
# Spark SQL over range(): each household's district is the same expression of h in both tables.
HOUSEHOLD_COLUMNS = (f"CAST({FIRST_ACCOUNT} + id AS INT) AS household_id",
                     f"{_pick(DISTRICTS, 1, 'id')} AS district",
                     "CAST(1 + pmod(hash(id, 2), 6) AS INT) AS occupants",
                     f"{_pick(TARIFFS, 3, 'id')} AS tariff",
                     "pmod(hash(id, 4), 3) = 0 AS has_garden")
READING_COLUMNS = (f"CAST({FIRST_ACCOUNT} + id DIV {DAYS} AS INT) AS household_id",
                   f"{_pick(DISTRICTS, 1, f'id DIV {DAYS}')} AS district",
                   f"date_add(DATE'{YEAR}-01-01', CAST(id % {DAYS} AS INT)) AS reading_date",
                   # about 1 reading in 60 missing (NULL), the rest 0.0 .. 399.9 litres plus a
                   # household habit of 0 .. 199.9, a few leaks above the declared 2000
                   "CAST(CASE WHEN pmod(hash(id, 5), 60) = 0 THEN NULL "
                   f"WHEN pmod(hash(id, 6), 5000) = 0 THEN 2500 "
                   f"ELSE (pmod(hash(id, 7), 4000) + pmod(hash(id DIV {DAYS}, 8), 2000)) / 10 "
                   "END AS DECIMAL(7,1)) AS litres")

# A policy for the readings protected per row (the row table of the comparison).
ROW_TABLE_POLICY = f"""table = "reading_rows"
source = "{SCHEMA}.meter_readings"
description = "The readings, protected per row (benchmark only)"

[budget]
cap = 1000000.0

[columns.district]
kind = "category"
values = [{", ".join(f'"{d}"' for d in DISTRICTS)}]

[columns.litres]
kind = "number"
range = [0, 2000]
step = 0.1
"""

# (label, analyst, analyst SQL, the same question as plain exact Spark SQL)
QUERIES = [
    ("row table: count, litres by district", "planner",
     "SELECT district, COUNT(*), SUM(litres) FROM reading_rows GROUP BY district",
     f"SELECT district, count(*), sum(litres) FROM {SCHEMA}.meter_readings GROUP BY district"),
    ("per household: litres by district", "planner",
     "SELECT district, SUM(litres) FROM readings GROUP BY district",
     f"SELECT district, sum(litres) FROM {SCHEMA}.meter_readings GROUP BY district"),
    ("per household: litres by month", "planner",
     "SELECT date_trunc('month', reading_date) AS m, SUM(litres) FROM readings GROUP BY 1",
     f"SELECT date_trunc('month', reading_date), sum(litres) FROM {SCHEMA}.meter_readings "
     "GROUP BY 1"),
]


# Session settings that change how both sides run (not what they compute), printed per run.
SHOWN_SETTINGS = ("spark.master", "spark.sql.adaptive.enabled", "spark.sql.shuffle.partitions",
                  "spark.sql.ansi.enabled")


def _load() -> str:
    return " ".join(f"{x:.1f}" for x in os.getloadavg())


def load_tables(session, households: int) -> int:
    """Write ``{SCHEMA}.households`` and ``{SCHEMA}.meter_readings`` as Parquet, generated by
    Spark; returns the number of readings."""
    session.sql(f"CREATE DATABASE IF NOT EXISTS {SCHEMA}")
    session.range(households).selectExpr(*HOUSEHOLD_COLUMNS).write.mode("overwrite") \
        .format("parquet").saveAsTable(f"{SCHEMA}.households")
    session.range(households * DAYS).selectExpr(*READING_COLUMNS).write.mode("overwrite") \
        .format("parquet").saveAsTable(f"{SCHEMA}.meter_readings")
    return households * DAYS


def bench_policies(folder: Path) -> Path:
    """The generous demo policies plus the row table, granted to the planner."""
    target = generous_policies(folder)
    (target / "tables" / "reading_rows.toml").write_text(ROW_TABLE_POLICY)
    access = target / "access.toml"
    text = access.read_text()
    granted = 'tables = ["households", "readings", "tariffs"]'
    assert granted in text
    # The public price list is not written into Spark here: its policy and grant are left out.
    (target / "tables" / "tariffs.toml").unlink()
    access.write_text(text.replace(granted,
                                   'tables = ["households", "readings", "reading_rows"]', 1))
    return target


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--backend", required=True, help="sc://HOST:PORT")
    parser.add_argument("--ledger", required=True, help="PostgreSQL DSN for the ledger")
    parser.add_argument("--households", type=int, default=27_400)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--no-load", action="store_true", help="use the tables already written")
    parser.add_argument("--query", type=int, action="append", choices=range(len(QUERIES)),
                        help="time only this query (0 row table, 1 by district, 2 by month); "
                             "repeatable")
    parser.add_argument("--explain", action="store_true",
                        help="print Spark's plan of the per-household query, then stop")
    args = parser.parse_args()
    console = Console()
    with tempfile.TemporaryDirectory() as folder:
        policies = load_policies(bench_policies(Path(folder)))
        engine = Engine.connect(policies, args.backend, args.ledger)
        try:
            session = engine.backend._session  # type: ignore[attr-defined]
            if not args.no_load:
                started = time.perf_counter()
                rows = load_tables(session, args.households)
                console.print(f"wrote {rows:,} readings as Parquet in "
                              f"{time.perf_counter() - started:.1f} s")
            rows = session.sql(f"SELECT count(*) FROM {SCHEMA}.meter_readings").collect()[0][0]
            if args.explain:
                sent = engine.backend.sent_sql(engine.prepare("planner", QUERIES[1][2]).rewritten.sql)
                noise = {"hushql_bound_noise_0": ",".join(["0"] * 64)}
                console.print(session.sql(f"EXPLAIN FORMATTED {sent}", args=noise)
                              .collect()[0][0], markup=False, highlight=False)
                return
            # Both sides run in this one session, under the same settings: shown, as the load.
            settings = ", ".join(f"{name.removeprefix('spark.')} {session.conf.get(name)}"
                                 for name in SHOWN_SETTINGS)
            console.print(f"Spark settings: {settings}", markup=False, highlight=False)
            console.print(f"load average before: {_load()}", highlight=False)
            table = Table("query", "plain Spark (ms)", "hushql (ms)", "ratio",
                          "hushql ns/row", title=f"{rows:,} readings, median of {args.repeat}")
            for label, analyst, analyst_sql, plain_sql in [QUERIES[i] for i in sorted(
                    set(args.query or range(len(QUERIES))))]:
                plain = median_ms(lambda: session.sql(plain_sql).collect(), args.repeat, warmup=1)
                hushql = median_ms(lambda: engine.answer(analyst, analyst_sql,
                                                         epsilon=Decimal("0.1"), fresh=True),
                                   args.repeat, warmup=1)
                table.add_row(label, f"{plain:.0f}", f"{hushql:.0f}", f"{hushql / plain:.2f}x",
                              f"{hushql * 1e6 / rows:.0f}")
            console.print(table)
            console.print(f"load average after: {_load()} on {os.cpu_count()} cores",
                          highlight=False)
        finally:
            engine.close()


if __name__ == "__main__":
    main()
