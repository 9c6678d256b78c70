"""Benchmark: the privacy ledger's durable reservation, against a bare durable transaction.

Measures, in a scratch database it creates and drops:
- p50 of one ``reserve`` alone and of ``reserve`` + ``finish`` (one analyst, one capped table);
- p50 of the bare baseline: the same work written by hand (UPDATE one budget row, INSERT one
  charge, COMMIT with synchronous_commit on), to show what the ledger's checks cost;
- throughput with 32 threads charging one analyst (they take turns on its row), and 32 threads
  charging 32 analysts on 32 tables (they share no row).
Bounded: a few thousand reservations in all, some seconds.

Run: ``python benchmarks/bench_ledger.py [ADMIN_DSN]`` (default ``HUSHQL_TEST_DSN``, else
postgresql://postgres@127.0.0.1:5432/postgres).
"""

from __future__ import annotations

import os
import statistics
import sys
import threading
import time
import uuid
from concurrent.futures import ThreadPoolExecutor
from decimal import Decimal
from types import SimpleNamespace

import psycopg
from psycopg.conninfo import conninfo_to_dict, make_conninfo

from proxy.ledger import Ledger

ROUNDS = 500
THREADS = 32
PER_THREAD = 40
EPSILON = Decimal("0.001")


def _budgets(analysts: list[str], tables: list[str]) -> SimpleNamespace:
    """The attributes Ledger.sync_budgets reads, with budgets no benchmark exhausts; each
    table is a population of its own."""
    return SimpleNamespace(
        analysts={name: SimpleNamespace(budget=Decimal(10**6)) for name in analysts},
        tables={name: SimpleNamespace(budget=SimpleNamespace(cap=Decimal(10**6)),
                                      population=name)
                for name in tables})


def _p50_ms(run: object, rounds: int) -> float:
    timings = []
    for _ in range(rounds):
        start = time.perf_counter()
        run()  # type: ignore[operator]
        timings.append((time.perf_counter() - start) * 1000.0)
    return statistics.median(timings)


def reserve_p50_ms(dsn: str, rounds: int = ROUNDS) -> float:
    """p50 milliseconds of one reserve + finish on a ledger in database ``dsn``."""
    with Ledger(dsn, pool_size=1) as ledger:
        ledger.sync_budgets(_budgets(["planner"], ["readings"]))  # type: ignore[arg-type]

        def one() -> None:
            ledger.finish(ledger.reserve("planner", ["readings"], EPSILON, "SELECT 1", "f").charge_id,
                          "answered")
        for _ in range(20):
            one()  # warm-up: pool connection, prepared statements
        return _p50_ms(one, rounds)


def _measure(dsn: str) -> list[tuple[str, float, str]]:
    rows: list[tuple[str, float, str]] = []
    with Ledger(dsn, pool_size=8) as ledger:
        analysts = [f"analyst_{n}" for n in range(THREADS)]
        tables = [f"table_{n}" for n in range(THREADS)]
        ledger.sync_budgets(_budgets(["planner", *analysts],  # type: ignore[arg-type]
                                     ["readings", *tables]))
        for _ in range(20):
            ledger.reserve("planner", ["readings"], EPSILON, "SELECT 1", "f")
        rows.append(("reserve", _p50_ms(
            lambda: ledger.reserve("planner", ["readings"], EPSILON, "SELECT 1", "f"), ROUNDS),
            "ms p50"))
        rows.append(("reserve + finish", reserve_p50_ms(dsn), "ms p50"))
        rows.append(("bare UPDATE + INSERT + COMMIT", _bare_p50_ms(dsn), "ms p50"))
        for label, pick in (("32 threads, one analyst", lambda i: ("planner", "readings")),
                            ("32 threads, 32 analysts", lambda i: (analysts[i], tables[i]))):
            rows.append((label, _throughput(ledger, pick), "reservations/s"))
    return rows


def _bare_p50_ms(dsn: str) -> float:
    """The floor: one budget UPDATE and one charge INSERT, committed durably, no checks."""
    with psycopg.connect(dsn, autocommit=True) as conn:
        conn.execute("SET synchronous_commit = on")

        def one() -> None:
            with conn.transaction():
                conn.execute("UPDATE hushql.analyst_budgets SET spent = spent + %s "
                             "WHERE analyst = %s", [EPSILON, "planner"])
                conn.execute("INSERT INTO hushql.charges (analyst, tables, epsilon, statement,"
                             " fingerprint) VALUES (%s, %s, %s, %s, %s)",
                             ["planner", ["readings"], EPSILON, "SELECT 1", "f"])
        for _ in range(20):
            one()
        return _p50_ms(one, ROUNDS)


def _throughput(ledger: Ledger, pick: object) -> float:
    """Reservations per second with THREADS threads doing PER_THREAD reserve + finish each."""
    barrier = threading.Barrier(THREADS)

    def work(i: int) -> None:
        analyst, table = pick(i)  # type: ignore[operator]
        barrier.wait()
        for _ in range(PER_THREAD):
            ledger.finish(ledger.reserve(analyst, [table], EPSILON, "SELECT 1", "f").charge_id,
                          "answered")

    start = time.perf_counter()
    with ThreadPoolExecutor(THREADS) as pool:
        list(pool.map(work, range(THREADS)))
    return THREADS * PER_THREAD / (time.perf_counter() - start)


def main() -> None:
    """Create a scratch database, print the figures as a table, drop the database."""
    admin = (sys.argv[1] if len(sys.argv) > 1 else
             os.environ.get("HUSHQL_TEST_DSN", "postgresql://postgres@127.0.0.1:5432/postgres"))
    name = f"hushql_bench_{uuid.uuid4().hex[:10]}"
    with psycopg.connect(admin, autocommit=True) as conn:
        conn.execute(f'CREATE DATABASE "{name}"')
    params = conninfo_to_dict(admin)
    params["dbname"] = name
    try:
        rows = _measure(make_conninfo(**params))
    finally:
        with psycopg.connect(admin, autocommit=True) as conn:
            conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
    bare = rows[2][1]
    print("privacy ledger (durable commits), one reservation = one charge")
    print(f"{'measure':<32}{'value':>12}  {'unit':<16}{'vs bare':>8}")
    for label, value, unit in rows:
        ratio = f"{value / bare:.2f}x" if unit == "ms p50" else ""
        print(f"{label:<32}{value:>12.2f}  {unit:<16}{ratio:>8}")


if __name__ == "__main__":
    main()
