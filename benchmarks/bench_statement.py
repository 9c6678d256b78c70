"""Prepared statements with parameters: analysis per Execute, cached and bound late, against
fresh analysis of every Execute; and the same statement through the wire against PostgreSQL.

    .venv/bin/python benchmarks/bench_statement.py [--backend ADMIN_DSN] [--executions 1000]

Loads the demo into a database of its own on ``--backend``'s server (default
``HUSHQL_TEST_DSN``; dropped at the end). Then:

1. In the process, for each statement below, ``--executions`` Executes with a different value
   each (so no value repeats): the engine's planning per Execute (``Engine.prepare`` of the
   statement with its values: the plan cache, the late values' checks and the SQL filled in)
   against a fresh analysis and rewrite of the same values (what every Execute cost before
   plans were cached per class of values).
2. Through ``hushql serve --workers 1``: a psycopg prepared statement (``prepare=True``)
   executed ``--executions`` times with k varying, against the same statement sent straight to
   PostgreSQL; the median latency of each and the difference. The values never repeat within
   a run, so no answer could be a stored one: every answer is planned, charged and noised.

Nothing is asserted; the figures depend on the machine and on what else runs on it (the load
average is printed).
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
from pathlib import Path

import psycopg

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.common import BENCH_PASSWORD, generous_policies, serve, set_up, tear_down  # noqa: E402

from proxy.demo import load_scenario  # noqa: E402
from proxy.engine import Engine  # noqa: E402
from proxy.policy import load_policies  # noqa: E402
from proxy.wire import statements, types  # noqa: E402

ANALYST = "planner"
STATEMENTS = [
    ("SELECT COUNT(*) FROM households WHERE occupants = $1", "direct count"),
    ("SELECT district, COUNT(*), AVG(occupants) FROM households WHERE household_id > $1 "
     "GROUP BY district", "grouped, per household"),
]
WIRE = "SELECT COUNT(*) FROM households WHERE occupants = %s"
DIRECT = "SELECT COUNT(*) FROM utility.households WHERE occupants = %s"


def per_execute_ms(action, values: list[int]) -> tuple[float, float]:
    """Mean CPU milliseconds (the process's, so a loaded machine's waits do not count) and
    median wall milliseconds of ``action(value)`` over ``values``."""
    times = []
    cpu = time.process_time()
    for value in values:
        start = time.perf_counter()
        action(value)
        times.append((time.perf_counter() - start) * 1000)
    return (time.process_time() - cpu) * 1000 / len(values), statistics.median(times)


def analysis(engine: Engine, executions: int) -> None:
    print(f"analysis per Execute, {executions} Executes, a new value each time:")
    print(f"  {'statement':<26} {'cached+late: CPU mean, wall median (ms)':>40} "
          f"{'fresh: same (ms)':>18} {'ratio of CPU':>13}")
    for text, label in STATEMENTS:
        tree = statements.single(text).tree
        assert tree is not None
        oids = (types.INT8,)
        folded = statements.fold_casts(tree, oids)

        def bound(k: int):
            return statements.bound(text, folded, [k], oids)

        values = list(range(1, executions + 1))
        engine.prepare(ANALYST, bound(0))  # the first Execute plans the class
        cached_mean, cached_median = per_execute_ms(lambda k: engine.prepare(ANALYST, bound(k)),
                                                    values)
        fresh_mean, fresh_median = per_execute_ms(
            lambda k: engine._plan(ANALYST, bound(k).substituted()), values[:200])
        print(f"  {label:<26} {cached_mean:>25.4f} {cached_median:>14.4f} "
              f"{fresh_mean:>9.3f} {fresh_median:>8.3f} {fresh_mean / cached_mean:>12.0f}x")
    print("  (cached+late: Engine.prepare of the statement with its values, which is all the "
          "analysis an Execute does; fresh: analyse + rewrite of the substituted tree)")


def wire(proxy_port: int, direct_dsn: str, executions: int) -> None:
    def latencies(conninfo: dict, text: str) -> list[float]:
        with psycopg.connect(**conninfo, autocommit=True) as conn:
            conn.execute(text, (0,), prepare=True)
            out = []
            for k in range(1, executions + 1):
                start = time.perf_counter()
                conn.execute(text, (k,), prepare=True).fetchall()
                out.append((time.perf_counter() - start) * 1000)
            return out

    through = latencies({"host": "127.0.0.1", "port": proxy_port, "user": ANALYST,
                         "password": BENCH_PASSWORD, "dbname": "hushql_demo"}, WIRE)
    direct = latencies({"conninfo": direct_dsn}, DIRECT)
    t, d = statistics.median(through), statistics.median(direct)
    print(f"\nthrough the wire, psycopg prepare=True, {executions} Executes, k = 1..{executions}:")
    print(f"  median latency: hushql {t:.3f} ms, PostgreSQL {d:.3f} ms, added {t - d:.3f} ms "
          f"({t / d:.1f}x)")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--backend", default=os.environ.get("HUSHQL_TEST_DSN"),
                        help="admin DSN of a PostgreSQL server (default HUSHQL_TEST_DSN)")
    parser.add_argument("--executions", type=int, default=1000)
    args = parser.parse_args()
    if not args.backend:
        parser.error("give --backend or set HUSHQL_TEST_DSN")
    print(f"load average: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
    folder, name, dsn = set_up(args.backend, "statement")
    proxy = None
    try:
        load_scenario(dsn, households=3000, progress=False)
        policies = generous_policies(folder)
        engine = Engine.connect(load_policies(policies), dsn, pool_size=2)
        try:
            analysis(engine, args.executions)
        finally:
            engine.close()
        proxy, port = serve(policies, dsn, folder / "serve.log", pool_size=4)
        wire(port, dsn, args.executions)
    finally:
        tear_down(proxy, folder, args.backend, dsn, name)
    return 0


if __name__ == "__main__":
    sys.exit(main())
