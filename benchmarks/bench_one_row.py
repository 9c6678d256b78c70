"""The demo's households counts: plain query, per-individual rewrite, one-row-per-individual query.

    .venv/bin/python benchmarks/bench_one_row.py --backend ADMIN_DSN [--repeat 41]

Loads the demo scenario into a scratch database (dropped afterwards). households has a primary
key on household_id and most_rows = 1, so the rewrite may skip the per-individual steps
(proxy.sql.rewrite, module notes 8). For ``SELECT COUNT(*) FROM households WHERE occupants = k``
(k = 1..8, interleaved) it prints the median of PostgreSQL's own "Execution Time" (EXPLAIN
ANALYZE) and of the client's round trip, for the plain query, the per-individual rewrite (as
without the constraint) and the one-row query, with ratios to the plain query measured in the
same run. Then the same counts answered by the engine in-process (plan cached, ledger charge,
backend query, noise), first with the primary key, then after dropping it and reloading the
policies (the per-individual query), with the plain query's round trip for the ratio. Nothing
here asserts a speed.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import tempfile
import time
import uuid
from decimal import Decimal
from pathlib import Path

import psycopg

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.common import generous_policies, median_ms  # noqa: E402
from proxy.backend import Backend  # noqa: E402
from proxy.engine import Engine  # noqa: E402
from proxy.ledger import Ledger  # noqa: E402
from proxy.demo import load_scenario  # noqa: E402
from proxy.dsn import with_database  # noqa: E402
from proxy.policy import load_policies  # noqa: E402
from proxy.sql.analyse import analyse  # noqa: E402
from proxy.sql.rewrite import rewrite  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
QUERY = "SELECT COUNT(*) FROM households WHERE occupants = {k}"
PLAIN = "SELECT COUNT(*) FROM utility.households WHERE occupants = {k}"


def _times(conn: psycopg.Connection, sql: str) -> tuple[float, float, float]:
    """(server planning ms, execution ms, from EXPLAIN ANALYZE; client round trip ms of the
    query itself)."""
    plan = conn.execute(f"EXPLAIN (ANALYZE, FORMAT JSON) {sql}").fetchone()[0]
    start = time.perf_counter()
    conn.execute(sql).fetchall()
    return (float(plan[0]["Planning Time"]), float(plan[0]["Execution Time"]),
            (time.perf_counter() - start) * 1000)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--backend", required=True, help="admin DSN (a scratch database is made)")
    parser.add_argument("--repeat", type=int, default=41)
    args = parser.parse_args()
    name = f"bench_one_row_{uuid.uuid4().hex[:8]}"
    with psycopg.connect(args.backend, autocommit=True) as admin:
        admin.execute(f'CREATE DATABASE "{name}"')
    dsn = with_database(args.backend, name)
    try:
        load_scenario(dsn, progress=False)
        policies = load_policies(ROOT / "policies")
        backend = Backend(dsn, pool_size=1)
        unique = backend.unique_keys(policies.tables["households"].source)
        backend.close()
        print(f"unique keys of utility.households (from pg_index): "
              f"{sorted(sorted(key) for key in unique)}")
        shapes: dict[str, list[str]] = {"plain": [], "per-individual": [], "one row": []}
        for k in range(1, 9):
            plan = analyse(QUERY.format(k=k), policies, "planner")
            shapes["plain"].append(PLAIN.format(k=k))
            shapes["per-individual"].append(rewrite(plan).sql)
            one_row = rewrite(plan, frozenset(), unique)
            assert one_row.held_rows == 1
            shapes["one row"].append(one_row.sql)
        figures: dict[str, list[list[float]]] = {s: [[], [], []] for s in shapes}
        with psycopg.connect(dsn, autocommit=True) as conn:
            for round_ in range(args.repeat + 2):  # two warm-up rounds
                for k in range(8):
                    for shape, sqls in shapes.items():
                        if round_ >= 2:
                            for kept, value in zip(figures[shape], _times(conn, sqls[k])):
                                kept.append(value)
                        else:
                            _times(conn, sqls[k])
        print(f"{'query':<16}" + "".join(f"{h:>14}{'x plain':>9}" for h in
                                         ("planning ms", "execution ms", "round trip ms")))
        base = [statistics.median(kept) for kept in figures["plain"]]
        for shape in shapes:
            medians = [statistics.median(kept) for kept in figures[shape]]
            print(f"{shape:<16}" + "".join(f"{m:>14.3f}{m / b:>9.2f}" for m, b in zip(medians, base)))
        print(f"medians of {args.repeat} rounds x 8 values of k; load average "
              f"{' '.join(f'{x:.1f}' for x in os.getloadavg())}")
        print(json.dumps({"one_row_sql": shapes["one row"][2]}))
        _engine_answers(dsn, args.repeat)
    finally:
        with psycopg.connect(args.backend, autocommit=True) as admin:
            admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def _engine_answers(dsn: str, repeat: int) -> None:
    """Median in-process answer time of the counts with the key, then without, vs plain."""
    with tempfile.TemporaryDirectory() as folder:
        policies = load_policies(generous_policies(Path(folder)))
        engine = Engine(policies, Backend(dsn, pool_size=2), Ledger(dsn, pool_size=2))
        queries = [QUERY.format(k=k) for k in range(1, 9)]
        turn = iter(range(10 ** 9))

        def answer() -> None:
            engine.answer("planner", queries[next(turn) % 8], epsilon=Decimal("0.1"))

        try:
            with psycopg.connect(dsn, autocommit=True) as conn:
                def plain() -> None:
                    conn.execute(PLAIN.format(k=1 + next(turn) % 8)).fetchall()

                fast = engine.prepare("planner", queries[0]).rewritten.held_rows == 1
                rows = [("plain, direct", median_ms(plain, repeat * 8)),
                        (f"engine, key (one row: {fast})", median_ms(answer, repeat * 8))]
                conn.execute("ALTER TABLE utility.households DROP CONSTRAINT households_pkey "
                             "CASCADE")
                engine.reload(policies)
                slow = engine.prepare("planner", queries[0]).rewritten.held_rows == 1
                rows.append((f"engine, no key (one row: {slow})", median_ms(answer, repeat * 8)))
                rows.append(("plain, direct", median_ms(plain, repeat * 8)))
        finally:
            engine.close()
    base = statistics.median([rows[0][1], rows[-1][1]])
    print(f"{'in-process answer':<34}{'median ms':>11}{'x plain':>9}")
    for label, ms in rows:
        print(f"{label:<34}{ms:>11.3f}{ms / base:>9.2f}")
    print(f"load average {' '.join(f'{x:.1f}' for x in os.getloadavg())}")


if __name__ == "__main__":
    main()
