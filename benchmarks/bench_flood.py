"""Free work against a running proxy: statement floods, idle sockets, catalog floods.

    .venv/bin/python benchmarks/bench_flood.py --backend ADMIN_DSN [--flood-seconds 30]
        [--statement-bytes N] [--households 300]

The demo scenario goes into a database of its own on the backend's server (dropped at the end)
and ``hushql serve`` runs as a child process on a free loopback port, with a copy of the demo
policies whose budgets no run can exhaust. Three measurements, each bounded in time:

1. **Statement flood.** Six connections of ``planner`` send different maximal statements
   (about the largest message the proxy reads, 1 MiB by default), all refused at no epsilon,
   as fast as they are answered. Meanwhile ``researcher`` sends a small DP query in a loop.
   Printed: its median, p95 and largest latency, quiet and during the flood, and the ratio of
   the medians (target: at most 2), with what the flood got back.
2. **Idle sockets.** 200 TCP connections that never speak, then an administrator logs in.
   Printed: whether, and how fast.
3. **Catalog flood.** Four connections ask for a 78 MB ``array_agg(generate_series(...))``
   over and over (and a 16 MB string made with ``||``), on a proxy whose refusal allowance is
   switched off (so the catalog's own bound is what is measured). Printed: the proxy's
   resident memory before, at its peak (read every 0.1 s and from VmHWM) and after (target:
   under 300 MB).
4. **Statement flood without the allowance**, on that same proxy: what the parse lane alone
   does (long statements off the event loop, one at a time), for comparison with 1.

Nothing asserts a speed; the targets are printed beside the figures.
"""

from __future__ import annotations

import argparse
import re
import socket
import statistics
import sys
import tempfile
import threading
import time
from collections import Counter
from pathlib import Path
from typing import Callable

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

import psycopg  # noqa: E402
from psycopg.conninfo import make_conninfo  # noqa: E402

from benchmarks.bench_wire import (create_database, drop_catalog_mirrors,  # noqa: E402
                                   drop_database, start_proxy_subprocess)
from benchmarks.common import generous_policies  # noqa: E402
from proxy.demo import DEMO_DATABASE, demo_accounts, load_scenario  # noqa: E402
from proxy.wire import codec  # noqa: E402
from tests.test_wire_fakes import RawClient  # noqa: E402

SMALL = "SELECT COUNT(*) FROM households WHERE has_garden"
FLOODERS = 6
CATALOG_FLOODERS = 4
IDLE = 200
# The 78 MB array, a 7 MB one that builds within the catalog's 3 s timeout on a busy
# machine, and a value doubled to 16 MB without calling any function.
CATALOG_QUESTIONS = [
    "SELECT array_agg(g) FROM generate_series(1, 10000000) g",
    "SELECT array_agg(g) FROM generate_series(1, 1000000) g",
    "WITH RECURSIVE r(s, n) AS (SELECT 'xy'::text, 1 UNION ALL SELECT s || s, n + 1 FROM r "
    "WHERE n < 24) SELECT s FROM r",
]
TARGET_RATIO = 2.0
TARGET_RSS_MB = 300.0


def maximal_statement(i: int, size: int) -> str:
    """A different statement of about ``size`` bytes each time: the heavy OR-ed arithmetic of
    the timing probe, made refusable (raw rows, or a syntax error at the very end)."""
    term = " OR occupants * 1234567890123456789012345678901234567890.{} > {}"
    head = f"SELECT household_id FROM households WHERE occupants = {i}"
    terms, n = [], 0
    while len(head) + n < size - 64:
        t = term.format(i, n)
        terms.append(t)
        n += len(t)
    return head + "".join(terms) + (" AND" if i % 2 else "")


def rss_mb(pid: int) -> tuple[float, float]:
    """(VmRSS, VmHWM) of a process in MB, from /proc (Linux)."""
    values = {}
    with open(f"/proc/{pid}/status") as status:
        for line in status:
            key, _, rest = line.partition(":")
            if key in ("VmRSS", "VmHWM"):
                values[key] = int(rest.split()[0]) / 1024
    return values["VmRSS"], values["VmHWM"]


def timed(conn: psycopg.Connection, query: str) -> float:
    started = time.perf_counter()
    conn.execute(query).fetchall()
    return (time.perf_counter() - started) * 1000


def describe(ms: list[float]) -> str:
    ms = sorted(ms)
    return (f"n={len(ms):4d}  median {statistics.median(ms):8.1f} ms  "
            f"p95 {ms[int(0.95 * (len(ms) - 1))]:8.1f} ms  max {ms[-1]:8.1f} ms")


def flood(address: tuple[str, int], user: str, password: str, queries: Callable[[int], str],
          stop: threading.Event, outcomes: Counter, lock: threading.Lock) -> None:
    """One connection sending ``queries(i)`` until ``stop``; counts what comes back."""
    client = RawClient(address)
    client.sock.settimeout(180)
    try:
        if not isinstance(client.login(user=user, password=password)[-1], codec.ReadyForQuery):
            raise RuntimeError("flood login failed")
        i = 0
        while not stop.is_set():
            client.send(codec.Query(queries(i)).encode())
            got = client.until(codec.ReadyForQuery)
            codes = [m.get("C") for m in got if isinstance(m, codec.ErrorResponse)] or ["ok"]
            with lock:
                outcomes.update(codes)
            i += 1
    except (OSError, EOFError):
        pass
    finally:
        client.close()


def run_floods(address: tuple[str, int], count: int, user: str, password: str,
               queries: Callable[[int], str]) -> tuple[threading.Event, list[threading.Thread],
                                                       Counter]:
    stop, outcomes, lock = threading.Event(), Counter(), threading.Lock()
    threads = [threading.Thread(target=flood, args=(address, user, password,
                                                    lambda i, k=k: queries(k * 100_000 + i),
                                                    stop, outcomes, lock), daemon=True)
               for k in range(count)]
    for t in threads:
        t.start()
    return stop, threads, outcomes


def statement_flood(address: tuple[str, int], conninfo: str, seconds: float,
                    size: int, label: str) -> None:
    accounts = dict(demo_accounts())
    with psycopg.connect(conninfo, autocommit=True) as probe:
        probe.execute("SET hushql.fresh = on")  # timed answers run, not reused
        for _ in range(10):
            timed(probe, SMALL)
        quiet = [timed(probe, SMALL) for _ in range(100)]
        stop, threads, outcomes = run_floods(address, FLOODERS, "planner", accounts["planner"],
                                             lambda i: maximal_statement(i, size))
        during, started = [], time.monotonic()
        while time.monotonic() - started < seconds:
            during.append(timed(probe, SMALL))
            time.sleep(0.02)
        stop.set()
    ratio = statistics.median(during) / statistics.median(quiet)
    print(f"{label}: {FLOODERS} connections, statements of {size:,} bytes, {seconds:.0f} s")
    print(f"   quiet         {describe(quiet)}")
    print(f"   during flood  {describe(during)}")
    print(f"   median ratio {ratio:.2f} (target at most {TARGET_RATIO})")
    print(f"   flood answers by SQLSTATE: {dict(outcomes)}")
    for t in threads:
        t.join(1)


def idle_sockets(address: tuple[str, int], admin_conninfo: str) -> None:
    idle = [socket.create_connection(address, timeout=10) for _ in range(IDLE)]
    try:
        started = time.perf_counter()
        try:
            with psycopg.connect(admin_conninfo, autocommit=True) as conn:
                conn.execute("SHOW hushql.epsilon").fetchone()
            result = f"logged in after {(time.perf_counter() - started) * 1000:.0f} ms"
        except psycopg.OperationalError as error:
            result = f"REFUSED: {str(error).splitlines()[-1]}"
        print(f"2. {IDLE} idle TCP connections, then an administrator: {result}")
    finally:
        for sock in idle:
            sock.close()


def catalog_flood(address: tuple[str, int], pid: int, seconds: float) -> None:
    accounts = dict(demo_accounts())
    time.sleep(1.0)
    before, _ = rss_mb(pid)
    stop, threads, outcomes = run_floods(address, CATALOG_FLOODERS, "planner",
                                         accounts["planner"],
                                         lambda i: CATALOG_QUESTIONS[i % len(CATALOG_QUESTIONS)])
    peak, started = before, time.monotonic()
    while time.monotonic() - started < seconds:
        peak = max(peak, rss_mb(pid)[0])
        time.sleep(0.1)
    stop.set()
    for t in threads:
        t.join(30)
    time.sleep(1.0)
    after, high_water = rss_mb(pid)
    print(f"3. catalog flood: {CATALOG_FLOODERS} connections asking for arrays and strings of "
          f"7-78 MB, {seconds:.0f} s")
    print(f"   proxy resident memory: before {before:.0f} MB, peak {peak:.0f} MB "
          f"(VmHWM {high_water:.0f} MB), after {after:.0f} MB (target under {TARGET_RSS_MB:.0f})")
    print(f"   answers by SQLSTATE: {dict(outcomes)}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--backend", required=True, help="admin DSN of a PostgreSQL server")
    parser.add_argument("--flood-seconds", type=float, default=30.0)
    parser.add_argument("--catalog-seconds", type=float, default=20.0)
    parser.add_argument("--statement-bytes", type=int, default=(1 << 20) - 1024)
    parser.add_argument("--households", type=int, default=300)
    args = parser.parse_args()
    name, dsn = create_database(args.backend)
    folder = Path(tempfile.mkdtemp(prefix="hushql-bench-flood-"))
    proxies = []
    try:
        load_scenario(dsn, households=args.households, progress=False)
        policies = generous_policies(folder / "default")
        accounts = dict(demo_accounts())
        proxy = start_proxy_subprocess(policies, dsn, 8, 200, folder / "default.log", None)
        proxies.append(proxy)
        address = (proxy.host, proxy.port)

        def conninfo(user: str) -> str:
            return make_conninfo(host=proxy.host, port=proxy.port, user=user,
                                 password=accounts[user], dbname=DEMO_DATABASE,
                                 sslmode="disable", connect_timeout=60)

        statement_flood(address, conninfo("researcher"), args.flood_seconds,
                        args.statement_bytes, "1. statement flood")
        idle_sockets(address, conninfo("auditor"))
        proxy.stop()
        # The catalog's own bound, without the refusal allowance that would slow the flood.
        open_policies = generous_policies(folder / "open")
        access = open_policies / "access.toml"
        access.write_text(re.sub(r"refusals_allowed = \d+", "refusals_allowed = 1000000",
                                 access.read_text()))
        proxy = start_proxy_subprocess(open_policies, dsn, 8, 200, folder / "open.log", None)
        proxies.append(proxy)
        catalog_flood((proxy.host, proxy.port), proxy.pid, args.catalog_seconds)
        open_info = make_conninfo(host=proxy.host, port=proxy.port, user="researcher",
                                  password=accounts["researcher"], dbname=DEMO_DATABASE,
                                  sslmode="disable", connect_timeout=60)
        statement_flood((proxy.host, proxy.port), open_info, args.flood_seconds,
                        args.statement_bytes, "4. statement flood without the refusal "
                        "allowance (the parse lane alone)")
    finally:
        for proxy in proxies:
            proxy.stop()
        drop_catalog_mirrors(folder / "default" / "policies", dsn)
        drop_database(args.backend, name)


if __name__ == "__main__":
    main()
