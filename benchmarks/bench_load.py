"""Load test: many analysts at once through ``hushql serve --workers N``, checked against the
ledger.

    .venv/bin/python benchmarks/bench_load.py [--backend ADMIN_DSN] [--clients 32]
        [--seconds 10] [--workers N] [--pool-size 16] [--mix mixed|accepted]

Loads the demo into a database of its own on ``--backend``'s server (default
``HUSHQL_TEST_DSN``; dropped at the end) and serves it with a copy of the demo policies whose
budgets no run exhausts, except the researcher's, which is ``RESEARCHER_BUDGET`` so that its
later queries are refused for budget (53400). ``--clients`` asyncpg connections (half planner,
half researcher) send a fixed mix for ``--seconds``:

- accepted: ``SELECT COUNT(*) FROM households WHERE occupants = k``, k varying (charged 0.1);
- refused by the analysis: a query for raw rows (0A000, charged nothing);
- refused for want of a grant: the researcher asking readings (42501).

``--mix accepted`` sends only the accepted query, all as the planner: the throughput of
answers alone (in the mix, refused statements also cost their account waiting time, by
design). Every session sets ``hushql.fresh = on`` where the build knows it, so no answer is a
stored one: each is planned, charged and noised (the output says which held).

Then the same accepted query straight to PostgreSQL, with as many clients for as long, for the
ratio. It prints throughput, latency percentiles, answers by SQLSTATE, and the ledger's totals
checked against the clients' own counts: every answer a client received must have a charge row,
and every charge row an answer (or an error the client saw after its charge); and where one
answer's time goes, step by step, in this process (``--no-stages`` skips it). Nothing is
asserted about speed; a mismatch in the books exits 1.
"""

from __future__ import annotations

import argparse
import asyncio
import collections
import concurrent.futures
import os
import re
import shutil
import statistics
import sys
import tempfile
import time
import uuid
from dataclasses import dataclass, field
from datetime import datetime, timezone
from decimal import Decimal
from pathlib import Path

import psycopg
from psycopg import sql
from psycopg.conninfo import conninfo_to_dict
from rich.console import Console
from rich.table import Table

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.bench_wire import drop_catalog_mirrors  # noqa: E402
from benchmarks.common import BENCH_PASSWORD, generous_policies, serve  # noqa: E402

from proxy.demo import load_scenario  # noqa: E402
from proxy.dsn import with_database  # noqa: E402
from proxy.wire.workers import default_workers  # noqa: E402

RESEARCHER_BUDGET = "2.0"  # 20 answers at 0.1, then 53400
EPSILON = Decimal("0.1")  # the policy default each accepted query is charged
ACCEPTED = "SELECT COUNT(*) FROM households WHERE occupants = {k}"
DIRECT = "SELECT COUNT(*) FROM utility.households WHERE occupants = {k}"  # the exact query
RAW_ROWS = "SELECT household_id FROM households"
NOT_GRANTED = "SELECT COUNT(*) FROM readings"
FRESH = "SET hushql.fresh = on"  # where answers are stored: pay for new noise each time
MIX = ["accepted"] * 8 + ["raw rows", "not granted"]  # per client, cycled


@dataclass
class ClientCounts:
    """What one client saw: latencies of answers (s), outcomes by SQLSTATE ("ok" for answers)."""

    analyst: str
    latencies: list[float] = field(default_factory=list)
    outcomes: collections.Counter[str] = field(default_factory=collections.Counter)


def _statement(kind: str, analyst: str, k: int) -> str:
    if kind == "accepted":
        return ACCEPTED.format(k=k % 8 + 1)
    if kind == "raw rows":
        return RAW_ROWS
    return NOT_GRANTED if analyst == "researcher" else RAW_ROWS


async def _client(host: str, port: int, database: str, analyst: str, password: str | None,
                  stop_at: float, mix: list[str] | None, index: int, setup: list[str]
                  ) -> ClientCounts:
    import asyncpg

    counts = ClientCounts(analyst)
    conn = await asyncpg.connect(host=host, port=port, user=analyst, password=password,
                                 database=database, ssl=False, timeout=60,
                                 server_settings={"hushql.fresh": "on"})  # each answer charged
    try:
        for command in setup:
            await conn.execute(command)
        n = index
        while time.monotonic() < stop_at:
            text = _statement(mix[n % len(mix)], analyst, n) if mix is not None \
                else DIRECT.format(k=n % 8 + 1)
            n += 1
            started = time.perf_counter()
            try:
                await conn.fetch(text)
            except asyncpg.PostgresError as error:
                counts.outcomes[error.sqlstate or "none"] += 1
                continue
            counts.latencies.append(time.perf_counter() - started)
            counts.outcomes["ok"] += 1
    finally:
        await conn.close()
    return counts


async def _run(host: str, port: int, database: str, clients: int, seconds: float,
               mix: list[str] | None, users: list[tuple[str, str | None]],
               setup: list[str] = []) -> list[ClientCounts]:
    stop_at = time.monotonic() + seconds
    return list(await asyncio.gather(*(
        _client(host, port, database, *users[i % len(users)], stop_at, mix, i, setup)
        for i in range(clients))))


def _cpu_seconds(database: str, proxy_pid: int) -> dict[str, float]:
    """CPU seconds used so far (Linux /proc; empty elsewhere) by the proxy's processes, the
    PostgreSQL backends connected to ``database`` (its queries and its ledger alike) and this
    benchmark's own process (the clients)."""
    ticks = os.sysconf("SC_CLK_TCK") if hasattr(os, "sysconf") else 100
    used: collections.Counter[str] = collections.Counter()
    for pid in (p for p in os.listdir("/proc") if p.isdigit()) if os.path.isdir("/proc") else ():
        try:
            stat = Path(f"/proc/{pid}/stat").read_text()
            command = Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode()
        except OSError:
            continue
        fields = stat[stat.rfind(")") + 2:].split()
        parent, seconds = int(fields[1]), (int(fields[11]) + int(fields[12])) / ticks
        if int(pid) == os.getpid():
            used["the clients (this process)"] += seconds
        elif int(pid) == proxy_pid or parent == proxy_pid:
            used["hushql serve (all workers)"] += seconds
        elif command.startswith("postgres:") and f" {database} " in command:
            used["PostgreSQL backends (queries and ledger)"] += seconds
    return dict(used)


def _cpu_share(database: str, proxy_pid: int, seconds: float) -> dict[str, float]:
    """Cores used by each part over the middle half of a ``seconds``-long run starting now."""
    time.sleep(seconds / 4)
    before, started = _cpu_seconds(database, proxy_pid), time.monotonic()
    time.sleep(seconds / 2)
    after, elapsed = _cpu_seconds(database, proxy_pid), time.monotonic() - started
    return {part: (after[part] - before.get(part, 0.0)) / elapsed for part in after}


def _percentile(values: list[float], q: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(q * len(ordered)))] if ordered else float("nan")


def _with_researcher_budget(policies: Path) -> None:
    access = policies / "access.toml"
    text = access.read_text()
    text, n = re.subn(r"(\[analysts\.researcher\][^\[]*?budget\s*=\s*)[0-9.]+",
                      rf"\g<1>{RESEARCHER_BUDGET}", text, flags=re.S)
    assert n == 1, "the researcher's budget line was not found"
    access.write_text(text)


def _knows_fresh(port: int) -> bool:
    """Whether the proxy knows hushql.fresh (asked once, by the researcher, whose refusal
    allowance the run does not need: a refused SET costs its account waiting time)."""
    with psycopg.connect(host="127.0.0.1", port=port, user="researcher", password=BENCH_PASSWORD,
                         dbname="hushql_demo", autocommit=True) as conn:
        try:
            conn.execute(FRESH)
            return True
        except psycopg.Error:
            return False


def _books(dsn: str) -> dict[str, tuple[Decimal, int, int]]:
    """Per analyst: spent, charge rows, charge rows that did not end 'answered' (yet)."""
    with psycopg.connect(dsn) as conn:
        rows = conn.execute(
            "SELECT b.analyst, b.spent, count(c.id), count(c.id) FILTER (WHERE c.outcome IN "
            "('failed', 'cancelled')) FROM hushql.analyst_budgets b LEFT JOIN hushql.charges c "
            "USING (analyst) GROUP BY b.analyst, b.spent").fetchall()
    return {a: (spent, n, failed) for a, spent, n, failed in rows}


def _per_commit(dsn: str) -> float:
    """Mean reservations per ledger commit: a batch's charges share their transaction's
    ``now()``, so distinct ``reserved_at`` values count the commits (group commit at work)."""
    with psycopg.connect(dsn) as conn:
        row = conn.execute("SELECT count(*)::float / greatest(count(DISTINCT reserved_at), 1) "
                           "FROM hushql.charges").fetchone()
    return float(row[0]) if row else 0.0


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--backend", default=os.environ.get("HUSHQL_TEST_DSN"),
                        help="admin DSN of a PostgreSQL server (default HUSHQL_TEST_DSN)")
    parser.add_argument("--clients", type=int, default=32)
    parser.add_argument("--seconds", type=float, default=10.0)
    parser.add_argument("--workers", type=int, default=default_workers())
    parser.add_argument("--pool-size", type=int, default=16)
    parser.add_argument("--households", type=int, default=3000)
    parser.add_argument("--no-stages", dest="stages", action="store_false",
                        help="skip the breakdown of one answer's time into its steps")
    parser.add_argument("--mix", choices=("mixed", "accepted"), default="mixed",
                        help="mixed: the mix above from two analysts; accepted: only the accepted "
                             "count, all as the planner (the throughput of answers alone)")
    args = parser.parse_args()
    if not args.backend:
        parser.error("give --backend or set HUSHQL_TEST_DSN")
    console = Console(width=120)
    folder = Path(tempfile.mkdtemp(prefix="hushql-load-"))
    name = f"hushql_load_{uuid.uuid4().hex[:8]}"
    with psycopg.connect(args.backend, autocommit=True) as conn:
        conn.execute(sql.SQL("CREATE DATABASE {}").format(sql.Identifier(name)))
    dsn = with_database(args.backend, name)
    policies = generous_policies(folder)
    _with_researcher_budget(policies)
    proxy = None
    try:
        load_scenario(dsn, households=args.households, progress=False)
        proxy, port = serve(policies, dsn, folder / "serve.log", workers=args.workers,
                            pool_size=args.pool_size)
        analysts = [("planner", BENCH_PASSWORD), ("researcher", BENCH_PASSWORD)] \
            if args.mix == "mixed" else [("planner", BENCH_PASSWORD)]
        started = time.monotonic()
        args.fresh = _knows_fresh(port)
        with concurrent.futures.ThreadPoolExecutor(1) as sampler:
            cores = sampler.submit(_cpu_share, name, proxy.pid, args.seconds)
            through = asyncio.run(_run(
                "127.0.0.1", port, "hushql_demo", args.clients, args.seconds,
                MIX if args.mix == "mixed" else ["accepted"], analysts,
                [FRESH] if args.fresh else []))
            args.cores = cores.result()
        elapsed = time.monotonic() - started
        server = conninfo_to_dict(dsn)
        direct_started = time.monotonic()
        direct = asyncio.run(_run(
            str(server.get("host") or "127.0.0.1"), int(server.get("port") or 5432), name,
            args.clients, args.seconds, None,
            [(str(server.get("user") or "postgres"), server.get("password"))]))
        direct_elapsed = time.monotonic() - direct_started
        time.sleep(1.0)  # outcomes of the last answers are noted off the answer path
        books = _books(dsn)
        args.per_commit = _per_commit(dsn)
        stages = _stages(policies, dsn) if args.stages else []
    finally:
        if proxy is not None:
            proxy.terminate()
            proxy.wait(30)
        drop_catalog_mirrors(policies, dsn)
        with psycopg.connect(args.backend, autocommit=True) as conn:
            conn.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(
                sql.Identifier(name)))
        shutil.rmtree(folder, ignore_errors=True)
    for line in stages:
        console.print(line)
    return _report(console, args, through, elapsed, direct, direct_elapsed, books)


def _stages(policies: Path, dsn: str, repeat: int = 200) -> list[str]:
    """Where one answer's time goes, one at a time in this process (its own ledger schema, so
    the books above are untouched): median ms of each step of ``Engine.answer``."""
    from benchmarks.common import median_ms
    from proxy.answer_notes import Note
    from proxy.backend import Backend
    from proxy.engine import Engine, _bound_settings, epsilon_split
    from proxy.stored_answers import encode_answer
    from proxy.ledger import Ledger
    from proxy.policy import load_policies

    engine = Engine(load_policies(policies), Backend(dsn, pool_size=2),
                    Ledger(dsn, schema="hushql_stages", pool_size=2))
    try:
        text = ACCEPTED.format(k=3)
        prepared = engine.prepare("planner", text)
        split = epsilon_split(prepared.plan, prepared.rewritten, EPSILON)
        settings = _bound_settings(prepared.rewritten, split)
        rows = engine.backend.run(prepared.rewritten.sql, None, settings)
        # Answers of charges of their own to store (one each), made before the clock starts.
        answers = iter([engine._release(prepared, EPSILON, split, rows, engine.ledger.reserve(
            "planner", ["households"], EPSILON, text, prepared.fingerprint).charge_id)
            for _ in range(repeat + 2)])
        paid = datetime.now(timezone.utc)
        notes = iter([Note("planner", "stages", text, EPSILON, answer.charge_id,
                           encode_answer(answer), paid)
                      for answer in [engine._release(prepared, EPSILON, split, rows,
                                                     engine.ledger.reserve(
                                                         "planner", ["households"], EPSILON, text,
                                                         prepared.fingerprint).charge_id)
                                     for _ in range(repeat + 2)]])
        with psycopg.connect(dsn, autocommit=True) as conn:
            direct = median_ms(lambda: conn.execute(DIRECT.format(k=3)).fetchall(), repeat)
        figures = [
            ("the plain query straight to PostgreSQL", direct),
            ("plan (cached)", median_ms(lambda: engine.prepare("planner", text), repeat)),
            ("reserve: the durable charge (ledger commit)", median_ms(
                lambda: engine.ledger.reserve("planner", ["households"], EPSILON, text,
                                              prepared.fingerprint), repeat)),
            ("run: the rewritten query on PostgreSQL", median_ms(
                lambda: engine.backend.run(prepared.rewritten.sql, None, settings), repeat)),
            ("noise and release", median_ms(
                lambda: engine._release(prepared, EPSILON, split, rows, 0), repeat)),
            ("queue its note (stored answer, outcome)", median_ms(
                lambda: engine._note("planner", "stages", prepared, next(answers), paid),
                repeat)),
            ("  its write, later, off the answer's path (no fsync)", median_ms(
                lambda: engine.ledger.store_answers([next(notes)]), repeat)),
            ("the whole answer (Engine.answer fresh, no wire)", median_ms(
                lambda: engine.answer("planner", text, fresh=True), repeat)),
        ]
    finally:
        engine.close()
    return ["where one answer's time goes (one at a time, median ms):"] + [
        f"  {label:<46} {ms:8.3f}" for label, ms in figures]


def _report(console: Console, args: argparse.Namespace, through: list[ClientCounts],
            elapsed: float, direct: list[ClientCounts], direct_elapsed: float,
            books: dict[str, tuple[Decimal, int, int]]) -> int:
    table = Table("", "answers/s", "p50 ms", "p95 ms", "p99 ms", "answers", "errors by SQLSTATE",
                  title=f"{args.clients} clients for {args.seconds:.0f} s, "
                        f"{args.workers} worker(s), pool {args.pool_size}")
    for label, counts, seconds in ((f"through hushql ({args.mix})", through, elapsed),
                                   ("straight to PostgreSQL", direct, direct_elapsed)):
        latencies = [x for c in counts for x in c.latencies]
        outcomes = sum((c.outcomes for c in counts), collections.Counter())
        errors = ", ".join(f"{state} {n}" for state, n in sorted(outcomes.items())
                           if state != "ok") or "-"
        table.add_row(label, f"{outcomes['ok'] / seconds:.0f}",
                      f"{1000 * statistics.median(latencies):.2f}" if latencies else "-",
                      f"{1000 * _percentile(latencies, 0.95):.2f}",
                      f"{1000 * _percentile(latencies, 0.99):.2f}", str(outcomes["ok"]), errors)
    console.print(table)
    through_ok = [x for c in through for x in c.latencies]
    direct_ok = [x for c in direct for x in c.latencies]
    if through_ok and direct_ok:
        console.print(f"median added latency: "
                      f"{1000 * (statistics.median(through_ok) - statistics.median(direct_ok)):.2f}"
                      f" ms; load average now {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
    console.print("every answer noised and charged: " + (
        f"{FRESH} in every session" if args.fresh else
        "this build stores no answers (hushql.fresh unknown)"))
    ok = True
    ledger = Table("analyst", "answers seen", "charge rows", "failed/cancelled rows",
                   "spent (ledger)", "answers x 0.1", "books", title="ledger against the clients")
    for analyst in ("planner", "researcher"):
        seen = sum(c.outcomes["ok"] for c in through if c.analyst == analyst)
        spent, rows, failed = books.get(analyst, (Decimal(0), 0, 0))
        agrees = rows == seen + failed and spent == EPSILON * rows
        ok = ok and agrees
        ledger.add_row(analyst, str(seen), str(rows), str(failed), str(spent),
                       str(EPSILON * seen), "agree" if agrees else "MISMATCH")
    console.print(ledger)
    console.print(f"reservations per ledger commit (mean): {args.per_commit:.1f}")
    if args.cores:
        answers_per_second = sum(c.outcomes["ok"] for c in through) / elapsed
        console.print("CPU through hushql (middle half of the run): " + "; ".join(
            f"{part} {used:.2f} cores, {used / answers_per_second * 1000:.2f} ms per answer"
            for part, used in sorted(args.cores.items(), key=lambda item: -item[1])))
    direct_answers = sum(c.outcomes["ok"] for c in direct)
    if direct_answers:
        ratio = (sum(c.outcomes["ok"] for c in through) / elapsed) / (direct_answers
                                                                      / direct_elapsed)
        console.print(f"answers/s through hushql / direct: {ratio:.1%}" + (
            " (a fifth of the mix is refused queries, which charge nothing and are not counted "
            "as answers; refused statements also cost their account waiting time)"
            if args.mix == "mixed" else ""))
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
