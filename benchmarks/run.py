"""Benchmarks: prints a table of medians and ratios against direct PostgreSQL in the same run.

    .venv/bin/python benchmarks/run.py [--backend DSN] [--rows 1000000] [--repeat 15]

Without --backend a private PostgreSQL is started in a temporary folder. Measures
- analysis + rewrite of a typical GROUP BY (with and without the plan cache),
- noise for 10,000 cells,
- end-to-end answers on a one-million-row table against the same exact query sent straight to
  PostgreSQL: a row table, and the demo's readings table (protected per household).
Nothing here asserts a speed; it reports.
"""

from __future__ import annotations

import argparse
import importlib.util
import sys
import tempfile
from pathlib import Path

import psycopg
from rich.console import Console
from rich.table import Table

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.common import generous_policies, median_ms  # noqa: E402
from proxy.engine import Engine  # noqa: E402
from proxy.policy import load_policies  # noqa: E402
from proxy.sql.analyse import analyse  # noqa: E402
from proxy.sql.rewrite import rewrite  # noqa: E402

BENCH_TABLE = """
table = "meters"
source = "bench.meters"
description = "One row per meter (a row table for the benchmark)"

[columns.district]
kind = "category"
values = ["Northbank", "Old Mill", "Harbourside"]

[columns.litres]
kind = "number"
range = [0, 2000]
step = 0.1
"""



def load_bench_table(dsn: str, rows: int) -> None:
    with psycopg.connect(dsn, autocommit=True) as conn:
        conn.execute("DROP SCHEMA IF EXISTS bench CASCADE; CREATE SCHEMA bench")
        conn.execute(
            "CREATE TABLE bench.meters AS SELECT (ARRAY['Northbank','Old Mill','Harbourside'])"
            "[1 + g %% 3] AS district, round((random() * 2100)::numeric, 1) AS litres "
            "FROM generate_series(1, %s) g", (rows,))
        conn.execute("ANALYZE bench.meters")


def policies_with_bench(folder: Path) -> Path:
    """The demo policies with generous budgets, plus the one-million-row table for planner."""
    target = generous_policies(folder)
    (target / "tables" / "meters.toml").write_text(BENCH_TABLE)
    access = target / "access.toml"
    access.write_text(access.read_text().replace(
        'tables = ["households", "readings", "tariffs"]',
        'tables = ["households", "readings", "tariffs", "meters"]', 1))
    return target


def _noise_bench() -> float:
    spec = importlib.util.spec_from_file_location("bench_noise", ROOT / "benchmarks" / "bench_noise.py")
    module = importlib.util.module_from_spec(spec)  # type: ignore[arg-type]
    spec.loader.exec_module(module)  # type: ignore[union-attr]
    results = module.bench_noise()
    return max(results.values())


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--backend")
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--repeat", type=int, default=15)
    args = parser.parse_args()
    console = Console()
    folder = Path(tempfile.mkdtemp(prefix="hushql-bench-"))
    server = None
    dsn = args.backend
    if dsn is None:
        from proxy.localpg import start_local_postgres

        server = start_local_postgres(folder / "pg")
        dsn = server.dsn
    try:
        from proxy.demo import load_scenario

        with console.status("loading the demo scenario and a 1M-row table"):
            counts = load_scenario(dsn, progress=False)
            load_bench_table(dsn, args.rows)
        policies = load_policies(policies_with_bench(folder))
        typical = "SELECT district, COUNT(*), AVG(litres) FROM readings WHERE litres > 10 GROUP BY district"
        table = Table("measurement", "median ms", "direct PostgreSQL ms", "ratio", "target")
        uncached = median_ms(lambda: rewrite(analyse(typical, policies, "planner")), args.repeat * 20)
        table.add_row("analysis + rewrite, no cache", f"{uncached:.3f}", "", "", "< 3 ms")
        engine = Engine.connect(policies, dsn, pool_size=2)
        cached = median_ms(lambda: engine.prepare("planner", typical), args.repeat * 100)
        table.add_row("analysis + rewrite, plan cache", f"{cached:.4f}", "", "", "< 1 ms")
        table.add_row("noise, 10,000 cells", f"{_noise_bench():.2f}", "", "", "< 50 ms")
        cases = [
            ("row table (1M rows): GROUP BY district, COUNT, SUM",
             "SELECT district, COUNT(*), SUM(litres) FROM meters GROUP BY district",
             "SELECT district, COUNT(*), SUM(litres) FROM bench.meters GROUP BY district", "< 1.3"),
            (f"individuals ({counts['readings']:,} readings): GROUP BY district, COUNT, SUM",
             "SELECT district, COUNT(*), SUM(litres) FROM readings GROUP BY district",
             "SELECT district, COUNT(*), SUM(litres) FROM utility.meter_readings GROUP BY district", "< 3"),
            ("individuals: GROUP BY month (12 cells, whole-household bounds)",
             "SELECT date_trunc('month', reading_date) AS month, COUNT(*) FROM readings GROUP BY 1",
             "SELECT date_trunc('month', reading_date), COUNT(*) FROM utility.meter_readings GROUP BY 1",
             "< 3"),
        ]
        with psycopg.connect(dsn, autocommit=True) as direct:
            for label, dp_sql, exact_sql, target in cases:
                exact = median_ms(lambda: direct.execute(exact_sql).fetchall(), args.repeat)
                private = median_ms(lambda: engine.answer("planner", dp_sql, epsilon=None,
                                                          fresh=True), args.repeat)
                table.add_row(label, f"{private:.1f}", f"{exact:.1f}", f"{private / exact:.2f}", target)
        engine.close()
        console.print(table)
    finally:
        if server is not None:
            server.stop()


if __name__ == "__main__":
    main()
