"""Benchmark of the wire front: latency and throughput through the proxy against direct PostgreSQL.

    .venv/bin/python benchmarks/bench_wire.py [--backend ADMIN_DSN] [--clients 1,8,32,64]
        [--queries 100] [--pool-size 16] [--idle 200] [--in-process] [--profile FILE]

Without --backend a private PostgreSQL is started in a temporary folder; with it, the demo
scenario goes into a database of its own on that server, dropped at the end. The proxy runs as a
``hushql serve`` subprocess (``--in-process`` runs it on a thread of this process instead), on a
free loopback port, with a copy of the demo policies whose budgets no run can exhaust. The load
comes from a separate process of asyncpg connections, so client and server never share a GIL.

For each concurrency level every client sends the same number of queries, one after another,
first a cheap GROUP BY through the proxy (a DP answer, charged to ``planner``), then the same
exact query straight to PostgreSQL. The table shows median and p95 latency, throughput and the
median added latency (proxy median minus direct median). Last, the proxy's resident memory with
``--idle`` authenticated idle connections, read from /proc (Linux). Every loop is bounded in
count and time. Nothing asserts a speed; the targets are printed beside the figures.
"""

from __future__ import annotations

import argparse
import asyncio
import os
import shutil
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import uuid
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from multiprocessing import get_context
from pathlib import Path
from typing import Any, Callable

import psycopg
from psycopg import sql
from psycopg.conninfo import conninfo_to_dict
from rich.console import Console
from rich.table import Table

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.common import BENCH_PASSWORD, generous_policies  # noqa: E402

from proxy.dsn import with_database  # noqa: E402
from proxy.localpg import free_port, start_local_postgres  # noqa: E402

DP_QUERY = "SELECT district, COUNT(*) FROM households GROUP BY district"
EXACT_QUERY = "SELECT district, COUNT(*) FROM utility.households GROUP BY district"
ANALYST = "planner"
WARMUP_PER_CLIENT = 5
CONNECT_TIMEOUT_S = 30.0
LEVEL_TIME_LIMIT_S = 120.0  # one concurrency level, one side, is abandoned after this
STARTUP_TIMEOUT_S = 60.0
TARGET_ADDED_MS = 2.0
TARGET_QPS_AT_32 = 500.0
TARGET_RSS_MB = 200.0


# ---- set-up ---------------------------------------------------------------------------------

def create_database(admin_dsn: str) -> tuple[str, str]:
    """A new database on ``admin_dsn``'s server; returns (its name, its DSN)."""
    name = f"hushql_bench_wire_{uuid.uuid4().hex[:8]}"
    with psycopg.connect(admin_dsn, autocommit=True) as conn:
        conn.execute(sql.SQL("CREATE DATABASE {}").format(sql.Identifier(name)))
    return name, with_database(admin_dsn, name)


def drop_database(admin_dsn: str, name: str) -> None:
    """Drops the benchmark's database, disconnecting whatever is left (PostgreSQL 13+)."""
    with psycopg.connect(admin_dsn, autocommit=True) as conn:
        conn.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(
            sql.Identifier(name)))


def drop_catalog_mirrors(policies: Path, dsn: str) -> None:
    """Drops the catalog mirror databases the proxy made on a shared server for this run's
    database (their names derive from it, so no other database's mirrors are touched)."""
    try:
        from proxy.wire.catalog import build_catalog
    except ImportError:
        return
    from proxy.policy import load_policies

    build_catalog(load_policies(policies), dsn).drop_mirrors()


@dataclass
class Proxy:
    """A running proxy: where it listens, its process id, and how to stop it."""

    host: str
    port: int
    pid: int
    stop: Callable[[], None]


def wait_for_port(host: str, port: int, alive: Callable[[], bool], timeout: float) -> None:
    """Returns once ``host:port`` accepts TCP; raises if ``alive()`` turns False or on timeout."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if not alive():
            raise RuntimeError("the proxy exited during start-up")
        with socket.socket() as probe:
            probe.settimeout(0.5)
            if probe.connect_ex((host, port)) == 0:
                return
        time.sleep(0.1)
    raise RuntimeError(f"the proxy did not listen within {timeout:.0f} s")


def start_proxy_subprocess(policies: Path, backend: str, pool_size: int, max_connections: int,
                           log_path: Path, profile: Path | None) -> Proxy:
    """``hushql serve`` in a child process on a free loopback port (stderr to ``log_path``);
    under cProfile when ``profile`` is given (its main thread, the event loop, only)."""
    port = free_port()
    command = [sys.executable]
    if profile is not None:
        command += ["-m", "cProfile", "-o", str(profile)]
    command += ["-m", "proxy.cli", "serve", "--policies", str(policies), "--backend", backend,
                "--listen", f"127.0.0.1:{port}", "--pool-size", str(pool_size),
                "--max-connections", str(max_connections),
                # One process: its CPU time per answer is read from /proc below, and the
                # figures stay comparable with earlier runs (bench_load.py runs several).
                "--workers", "1"]
    log = open(log_path, "wb")  # noqa: SIM115 (closed by stop)
    child = subprocess.Popen(command, cwd=ROOT, stdout=log, stderr=subprocess.STDOUT)

    def stop() -> None:
        if child.poll() is None:
            child.send_signal(2)  # SIGINT: run_server closes connections, cProfile writes out
            try:
                child.wait(20)
            except subprocess.TimeoutExpired:
                child.kill()
                child.wait(5)
        log.close()

    try:
        wait_for_port("127.0.0.1", port, lambda: child.poll() is None, STARTUP_TIMEOUT_S)
    except BaseException:
        stop()
        raise
    return Proxy("127.0.0.1", port, child.pid, stop)


def start_proxy_thread(policies: Path, backend: str, pool_size: int,
                       max_connections: int) -> Proxy:
    """The proxy on a thread of this process (shares this process's GIL with nothing else:
    the load still comes from another process)."""
    from proxy.engine import Engine
    from proxy.policy import load_policies
    from proxy.wire.server import start_in_thread

    engine = Engine.connect(load_policies(policies), backend, pool_size=pool_size)
    host, port, stop_server = start_in_thread(engine, max_connections=max_connections)

    def stop() -> None:
        stop_server()
        engine.close()

    return Proxy(host, port, os.getpid(), stop)


# ---- load (runs in a separate process) ------------------------------------------------------

@dataclass
class Target:
    """Where a load connects and what it sends."""

    host: str
    port: int
    user: str
    password: str | None
    database: str
    query: str
    server_pid: int | None = None  # the proxy's process, whose CPU time is read around the load


async def _connect(target: Target) -> Any:
    import asyncpg

    return await asyncpg.connect(host=target.host, port=target.port, user=target.user,
                                 password=target.password, database=target.database, ssl=False,
                                 timeout=CONNECT_TIMEOUT_S, statement_cache_size=100,
                                 # Every answer computed anew, not a stored one given again
                                 # (PostgreSQL keeps it as an unused custom setting).
                                 server_settings={"hushql.fresh": "on"})


async def _connect_all(target: Target, count: int, at_once: int = 16) -> list[Any]:
    """``count`` connections, at most ``at_once`` authenticating together."""
    gate = asyncio.Semaphore(at_once)

    async def one() -> Any:
        async with gate:
            return await _connect(target)

    return list(await asyncio.wait_for(asyncio.gather(*(one() for _ in range(count))),
                                       CONNECT_TIMEOUT_S + count * 0.5))


async def _load(target: Target, clients: int, queries: int) -> dict[str, Any]:
    connections = await _connect_all(target, clients)
    try:
        async def warm(conn: Any) -> None:
            for _ in range(WARMUP_PER_CLIENT):
                await conn.fetch(target.query)

        await asyncio.wait_for(asyncio.gather(*(warm(c) for c in connections)),
                               LEVEL_TIME_LIMIT_S)
        latencies: list[float] = []
        errors = 0
        stop_at = time.monotonic() + LEVEL_TIME_LIMIT_S

        async def client(conn: Any) -> None:
            nonlocal errors
            for _ in range(queries):
                if time.monotonic() > stop_at:
                    return
                start = time.perf_counter()
                try:
                    rows = await conn.fetch(target.query)
                except Exception:
                    errors += 1
                    continue
                if len(rows) == 3:  # one row per declared district: an answer
                    latencies.append((time.perf_counter() - start) * 1000.0)
                else:
                    errors += 1

        cpu_before = _cpu_seconds(target.server_pid)
        started = time.perf_counter()
        await asyncio.gather(*(client(c) for c in connections))
        wall = time.perf_counter() - started
        cpu_after = _cpu_seconds(target.server_pid)
        cpu = None if cpu_before is None or cpu_after is None else cpu_after - cpu_before
        return {"latencies": latencies, "wall": wall, "errors": errors,
                "planned": clients * queries, "server_cpu": cpu}
    finally:
        await asyncio.gather(*(c.close(timeout=5) for c in connections),
                             return_exceptions=True)


def run_load(target: Target, clients: int, queries: int) -> dict[str, Any]:
    """Process entry: ``clients`` connections each sending ``queries`` queries in turn."""
    return asyncio.run(_load(target, clients, queries))


def _cpu_seconds(pid: int | None) -> float | None:
    """User + system CPU seconds of ``pid`` from /proc/<pid>/stat, or None (no pid, not Linux)."""
    if pid is None:
        return None
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    fields = text.rpartition(")")[2].split()  # the command name may hold spaces
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")  # utime, stime


def _rss_kb(pid: int) -> tuple[int, int]:
    """(VmRSS, VmHWM) of ``pid`` in kB, from /proc/<pid>/status (Linux)."""
    fields = {}
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        key, _, value = line.partition(":")
        if key in ("VmRSS", "VmHWM"):
            fields[key] = int(value.split()[0])
    return fields["VmRSS"], fields["VmHWM"]


async def _idle(target: Target, count: int, pid: int) -> dict[str, Any]:
    before = _rss_kb(pid)[0]
    connections = await _connect_all(target, count)
    try:
        await asyncio.sleep(1.0)  # let the server settle (buffers, thread pool)
        during, peak = _rss_kb(pid)
        return {"before_kb": before, "during_kb": during, "peak_kb": peak,
                "connections": len(connections)}
    finally:
        await asyncio.gather(*(c.close(timeout=5) for c in connections),
                             return_exceptions=True)


def run_idle(target: Target, count: int, pid: int) -> dict[str, Any]:
    """Process entry: hold ``count`` authenticated idle connections and read the server's RSS."""
    return asyncio.run(_idle(target, count, pid))


# ---- report ---------------------------------------------------------------------------------

@dataclass
class Side:
    """One concurrency level on one side (through the proxy, or direct)."""

    median_ms: float
    p95_ms: float
    qps: float  # answered queries per second of wall time
    answered: int
    not_answered: int  # errors, wrong shapes and queries skipped at the time limit
    server_cpu_ms: float | None  # proxy CPU time per answer, when measured


def summarise(result: dict[str, Any]) -> Side:
    """Medians, nearest-rank p95 and rates of one ``run_load`` result."""
    latencies = sorted(result["latencies"])
    if not latencies:
        return Side(float("nan"), float("nan"), 0.0, 0, result["planned"], None)
    p95 = latencies[min(len(latencies) - 1, int(0.95 * len(latencies)))]
    cpu = result.get("server_cpu")
    return Side(statistics.median(latencies), p95, len(latencies) / result["wall"],
                len(latencies), result["planned"] - len(latencies),
                None if cpu is None else cpu * 1000.0 / len(latencies))


def measure(through: Target, direct: Target, levels: list[int], queries: int, idle: int,
            proxy_pid: int, console: Console) -> tuple[list[tuple[int, Side, Side]],
                                                       dict[str, Any] | None]:
    """Runs every level (proxy side, then direct side) and the idle-memory step, each in a
    separate load process and each bounded in time; returns the rows and the memory figures."""
    rows: list[tuple[int, Side, Side]] = []
    level_timeout = LEVEL_TIME_LIMIT_S * 2 + CONNECT_TIMEOUT_S + 60
    memory = None
    with ProcessPoolExecutor(max_workers=1, mp_context=get_context("spawn")) as pool:
        for clients in levels:
            with console.status(f"{clients} clients x {queries} queries"):
                dp = summarise(pool.submit(run_load, through, clients, queries)
                               .result(level_timeout))
                exact = summarise(pool.submit(run_load, direct, clients, queries)
                                  .result(level_timeout))
            rows.append((clients, dp, exact))
        if idle > 0 and Path(f"/proc/{proxy_pid}/status").exists():
            with console.status(f"{idle} idle connections"):
                memory = pool.submit(run_idle, through, idle, proxy_pid).result(
                    CONNECT_TIMEOUT_S + idle * 0.5 + 60)
    return rows, memory


def report(console: Console, rows: list[tuple[int, Side, Side]], memory: dict[str, Any] | None,
           title: str, mode: str) -> None:
    """Prints the table, the queries, the targets and the memory line."""
    table = Table("clients", "proxy median ms", "proxy p95 ms", "direct median ms",
                  "direct p95 ms", "added median ms", "DP answers/s", "direct queries/s",
                  "proxy CPU ms/answer", "not answered proxy/direct", title=title)
    for clients, dp, exact in rows:
        table.add_row(str(clients), f"{dp.median_ms:.2f}", f"{dp.p95_ms:.2f}",
                      f"{exact.median_ms:.2f}", f"{exact.p95_ms:.2f}",
                      f"{dp.median_ms - exact.median_ms:.2f}", f"{dp.qps:.0f}",
                      f"{exact.qps:.0f}",
                      "-" if dp.server_cpu_ms is None else f"{dp.server_cpu_ms:.2f}",
                      f"{dp.not_answered}/{exact.not_answered}")
    console.print(table)
    console.print(f"query through the proxy: {DP_QUERY}", highlight=False)
    console.print(f"same query direct:       {EXACT_QUERY}", highlight=False)
    console.print(f"targets: added median < {TARGET_ADDED_MS} ms; >= {TARGET_QPS_AT_32:.0f} "
                  f"DP answers/s at 32 clients (2 cores); RSS < {TARGET_RSS_MB:.0f} MB with 200 "
                  "idle connections", highlight=False)
    if memory is not None:
        console.print(
            f"proxy resident memory ({mode}): {memory['before_kb'] / 1024:.1f} MB after the "
            f"load runs, {memory['during_kb'] / 1024:.1f} MB with {memory['connections']} idle "
            f"authenticated connections (peak so far {memory['peak_kb'] / 1024:.1f} MB)",
            highlight=False)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--backend", help="admin DSN of a PostgreSQL server to use (a database "
                                          "of its own is created and dropped)")
    parser.add_argument("--clients", default="1,8,32,64",
                        help="concurrency levels, comma-separated (default 1,8,32,64)")
    parser.add_argument("--queries", type=int, default=100, help="queries per client per level")
    parser.add_argument("--pool-size", type=int, default=16,
                        help="the proxy's --pool-size: backend connections; the ledger gets "
                             "half (default 16)")
    parser.add_argument("--idle", type=int, default=200,
                        help="idle connections for the memory figure (0 skips it)")
    parser.add_argument("--in-process", action="store_true",
                        help="run the proxy on a thread of this process, not as a subprocess "
                             "(memory is then this whole process's; no CPU figure)")
    parser.add_argument("--profile", type=Path,
                        help="write a cProfile of the proxy subprocess here (its event loop "
                             "thread only; for the engine threads attach py-spy to the pid)")
    args = parser.parse_args()
    levels = [int(x) for x in args.clients.split(",") if x.strip()]
    if not levels or min(levels) < 1 or max(levels) > 256 or not 1 <= args.queries <= 10_000 \
            or not 0 <= args.idle <= 1000:
        parser.error("clients must be 1..256, queries 1..10000 and idle 0..1000")
    console = Console(width=None if sys.stdout.isatty() else 150)
    began = time.perf_counter()
    folder = Path(tempfile.mkdtemp(prefix="hushql-bench-wire-"))
    server = proxy = None
    admin: str | None = args.backend
    database: str | None = None
    policies: Path | None = None
    try:
        if admin is None:
            with console.status("starting a private PostgreSQL"):
                server = start_local_postgres(folder / "pg")
            admin = server.dsn
        database, dsn = create_database(admin)
        from proxy.demo import load_scenario

        with console.status("loading the demo scenario"):
            counts = load_scenario(dsn, progress=False)
        policies = generous_policies(folder)
        max_connections = max(args.idle, max(levels)) + 16
        with console.status("starting the proxy"):
            if args.in_process:
                proxy = start_proxy_thread(policies, dsn, args.pool_size, max_connections)
            else:
                proxy = start_proxy_subprocess(policies, dsn, args.pool_size, max_connections,
                                               folder / "proxy.log", args.profile)
        params = conninfo_to_dict(dsn)
        through = Target(proxy.host, proxy.port, ANALYST, BENCH_PASSWORD, "hushql_demo",
                         DP_QUERY, None if args.in_process else proxy.pid)
        direct = Target(str(params.get("host", "127.0.0.1")), int(params.get("port", 5432)),
                        str(params.get("user", "postgres")), params.get("password"),
                        database, EXACT_QUERY)
        rows, memory = measure(through, direct, levels, args.queries, args.idle, proxy.pid,
                               console)
        mode = "in-process thread" if args.in_process else "subprocess"
        report(console, rows, memory, f"hushql wire benchmark ({mode}, {os.cpu_count()} CPUs, "
               f"{counts['households']:,} households, {args.queries} queries per client, "
               f"pool {args.pool_size})", mode)
        console.print(f"benchmark took {time.perf_counter() - began:.0f} s", highlight=False)
    finally:
        if proxy is not None:
            proxy.stop()
        if database is not None and admin is not None:
            try:
                if server is None and policies is not None:
                    drop_catalog_mirrors(policies, with_database(admin, database))
                drop_database(admin, database)
            except psycopg.Error as error:
                console.print(f"could not drop database {database}: {type(error).__name__}")
        if server is not None:
            server.stop()
        if args.profile is None:
            shutil.rmtree(folder, ignore_errors=True)
        else:
            console.print(f"proxy log kept in {folder}", highlight=False)


if __name__ == "__main__":
    main()
