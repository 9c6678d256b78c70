"""Timing probe: can answer times tell whether one named household matches a condition?

    .venv/bin/python benchmarks/bench_timing.py [--backend ADMIN_DSN] [--households 3000]
        [--repeats 5] [--steady-ms 150] [--shapes name,name]

The probe: ``SELECT COUNT(*) FROM households WHERE household_id = X AND has_garden AND
(<heavy>)``. PostgreSQL finds household X by its key and tests ``has_garden``; only when the
household has a garden does it evaluate ``<heavy>``. If ``<heavy>`` may cost much, the answer's
time says whether X has a garden. For every heavy shape below, built as large as the proxy's
default limits allow (and the original probe, which they refuse), the script asks the question
for 16 households (8 with a garden, 8 without, read straight from the backend) ``--repeats``
times each, in shuffled order, and prints per shape:

- through the proxy: the median answer time per household, classified as "garden" when above
  the median of all 16 (what an attacker without labels would do), the share classified right
  (chance is 50%; the target is at most 75%) and the gap between the medians of the two groups
  (target: under 10 ms);
- on the backend alone: the same figures for the proxy's own rewritten SQL sent straight to
  PostgreSQL (from EXPLAIN, which charges nothing), i.e. the data-dependent cost with the
  proxy's overhead and jitter removed;
- the same through a second proxy whose households table declares a steady answer time
  (``[timing] answer_after_ms``, unless ``--steady-ms 0``).

Without --backend a private PostgreSQL is started in a temporary folder; with it, the demo goes
into a database of its own, dropped at the end. The proxies run as ``hushql serve`` subprocesses
on loopback ports with the demo policies (budgets raised so no run exhausts them). Every loop is
bounded in count; nothing asserts a time.
"""

from __future__ import annotations

import argparse
import random
import shutil
import statistics
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import psycopg
from psycopg.conninfo import make_conninfo
from rich.console import Console
from rich.table import Table

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.bench_wire import (create_database, drop_catalog_mirrors,  # noqa: E402
                                   drop_database, start_proxy_subprocess)
from benchmarks.common import generous_policies  # noqa: E402

from proxy.demo import DEMO_DATABASE, PLANNER_PASSWORD  # noqa: E402
from proxy.dsn import with_database  # noqa: E402
from proxy.localpg import start_local_postgres  # noqa: E402
from proxy.sql.limits import Limits  # noqa: E402

TARGET_ACCURACY = 0.75
TARGET_GAP_MS = 10.0
PROBE = "SELECT COUNT(*) FROM households WHERE household_id = {x} AND has_garden AND ({heavy})"
LIMITS = Limits()  # the shapes are sized to the defaults


@dataclass(frozen=True)
class Shape:
    """A heavy condition made of ``term(k)`` for k = 0, 1, ... OR-ed together; ``fixed`` terms
    when given, else as many as the proxy accepts (the most that fit its limits)."""

    term: Callable[[int], str]
    fixed: int | None = None

    def condition(self, count: int) -> str:
        return " OR ".join(self.term(k) for k in range(count))

    def most_by_size(self) -> int:
        """The most terms whose probe fits the default statement size."""
        if self.fixed is not None:
            return self.fixed
        budget, count, size = LIMITS.statement_bytes - len(PROBE) - 20, 0, 0
        while count < 2000:
            size += len(self.term(count).encode()) + 4
            if size > budget:
                break
            count += 1
        return max(1, count)


def _digits(n: int, seed: int) -> str:
    return "".join(str((seed * 7 + i * 3) % 9 + 1) for i in range(n))


def _pattern(n: int, seed: int) -> str:
    return "".join("%" if i % 2 == 0 else "abcdefgh"[(seed + i) % 8] for i in range(n))


SHAPES: dict[str, Shape] = {
    "none (control)": Shape(lambda k: "TRUE", fixed=1),
    # The probe found: a 40-digit decimal multiplied a hundred times over, several times OR-ed.
    "original probe": Shape(lambda k: "occupants * " + " * ".join(
        [f"{_digits(20, k)}.{_digits(20, k + 1)}"] * 100) + " > 1", fixed=4),
    # The largest arithmetic the default arithmetic_digits admits, as many times as accepted.
    "long literal products": Shape(lambda k: "occupants * " + " * ".join(
        [f"{_digits(15, k)}.{_digits(15, k + 1)}"] * 3) + " > 1"),
    "trim with a long character set": Shape(
        lambda k: f"trim(district, '{_digits(LIMITS.pattern_characters, k)}') = 'x'"),
    "LIKE with a long pattern": Shape(
        lambda k: f"district LIKE '{_pattern(LIMITS.pattern_characters, k)}'"),
    "ILIKE with a long pattern": Shape(
        lambda k: f"district ILIKE '{_pattern(LIMITS.pattern_characters, k)}'"),
    "long text literals": Shape(
        lambda k: f"lower(district) = '{_digits(LIMITS.text_literal_characters, k)}'"),
    "long IN list": Shape(lambda k: "occupants * 1.5 IN (" + ", ".join(
        f"{i}.{i % 7}" for i in range(LIMITS.in_list_items)) + ")", fixed=1),
    "nested functions": Shape(
        lambda k: "length(" + "lower(upper(" * 18 + "district" + "))" * 18 + f") = {k}"),
    "many comparisons": Shape(lambda k: f"occupants * {k} + {k} = {k * 3 + 1}"),
}


@dataclass
class Figures:
    """How well answer times separate the two groups."""

    accuracy: float
    gap_ms: float
    median_ms: float


def figures(times: dict[int, list[float]], garden: dict[int, bool]) -> Figures:
    """Classify each household by its median time against the median of all (no labels used),
    then score against the truth; the gap is between the two groups' median times."""
    medians = {x: statistics.median(ts) for x, ts in times.items()}
    cut = statistics.median(medians.values())
    right = sum((medians[x] > cut) == garden[x] for x in medians)
    gap = (statistics.median(m for x, m in medians.items() if garden[x])
           - statistics.median(m for x, m in medians.items() if not garden[x]))
    return Figures(right / len(medians), gap * 1000, statistics.median(medians.values()) * 1000)


def measure(run: Callable[[int], None], households: list[int], repeats: int,
            rng: random.Random) -> dict[int, list[float]]:
    """Seconds per call of ``run(x)``, ``repeats`` per household, in shuffled order."""
    order = [x for x in households for _ in range(repeats)]
    rng.shuffle(order)
    times: dict[int, list[float]] = {x: [] for x in households}
    for x in order:
        start = time.perf_counter()
        run(x)
        times[x].append(time.perf_counter() - start)
    return times


def pick_households(dsn: str, seed: int) -> dict[int, bool]:
    """Eight households with a garden and eight without."""
    with psycopg.connect(dsn) as conn:
        rows = conn.execute("SELECT household_id, has_garden FROM utility.households "
                            "ORDER BY household_id").fetchall()
    rng = random.Random(seed)
    chosen = rng.sample([x for x, g in rows if g], 8) + rng.sample([x for x, g in rows if not g], 8)
    return {x: dict(rows)[x] for x in chosen}


def steady_policies(folder: Path, steady_ms: int) -> Path:
    """A copy of the generous policies whose households table declares a steady answer time."""
    target = generous_policies(folder)
    table = target / "tables" / "households.toml"
    text = table.read_text()
    table.write_text(text.replace("[budget]", f"[timing]\nanswer_after_ms = {steady_ms}\n\n"
                                              "[budget]", 1))
    return target


class Prober:
    """One analyst connection to a proxy, and one direct connection to the backend."""

    def __init__(self, host: str, port: int, backend_dsn: str) -> None:
        self.proxy = psycopg.connect(make_conninfo(host=host, port=port, user="planner",
                                                   password=PLANNER_PASSWORD,
                                                   dbname=DEMO_DATABASE), autocommit=True)
        self.proxy.execute("SET hushql.epsilon = 0.001")
        self.proxy.execute("SET hushql.fresh = on")  # every answer runs on the backend
        self.direct = psycopg.connect(backend_dsn, autocommit=True)

    def refusal(self, heavy: str) -> str | None:
        """The SQLSTATE refusing the probe, or None when it is accepted (EXPLAIN is free)."""
        try:
            self.proxy.execute("EXPLAIN " + PROBE.format(x=100001, heavy=heavy)).fetchall()
        except psycopg.Error as error:
            return error.sqlstate or "?"
        return None

    def backend_sql(self, x: int, heavy: str) -> str:
        rows = self.proxy.execute("EXPLAIN " + PROBE.format(x=x, heavy=heavy)).fetchall()
        return dict(rows)["backend sql"]

    def ask(self, x: int, heavy: str) -> None:
        try:
            self.proxy.execute(PROBE.format(x=x, heavy=heavy)).fetchall()
        except psycopg.errors.QueryCanceled:
            pass  # a timeout is an outcome too: its time is what is measured

    def close(self) -> None:
        self.proxy.close()
        self.direct.close()


def probe_all(console: Console, prober: Prober, garden: dict[int, bool], repeats: int,
              shapes: list[str], title: str, direct: bool) -> Table:
    table = Table(title=title)
    table.add_column("heavy shape")
    table.add_column("bytes", justify="right")
    table.add_column("proxy: right", justify="right")
    table.add_column("proxy: gap ms", justify="right")
    table.add_column("proxy: median ms", justify="right")
    if direct:
        table.add_column("backend: right", justify="right")
        table.add_column("backend: gap ms", justify="right")
        table.add_column("backend: median ms", justify="right")
    rng = random.Random(7)
    households = list(garden)
    for name in shapes:
        shape = SHAPES[name]
        count = shape.most_by_size()
        refused = prober.refusal(shape.condition(count))
        while refused is not None and refused.startswith("54") and shape.fixed is None \
                and count > 1:
            count = count * 4 // 5  # fewer terms, until the limits accept it
            refused = prober.refusal(shape.condition(count))
        heavy = shape.condition(count)
        size = len(PROBE.format(x=100001, heavy=heavy).encode())
        label = f"{name} ({count} terms)" if shape.fixed is None else name
        if refused is not None:
            table.add_row(label, str(size), f"refused {refused}", "", "",
                          *(["", "", ""] if direct else []))
            continue
        with console.status(f"{title}: {name}"):
            through = figures(measure(lambda x: prober.ask(x, heavy), households, repeats, rng),
                              garden)
            cells = [f"{through.accuracy:.0%}", f"{through.gap_ms:+.2f}", f"{through.median_ms:.1f}"]
            if direct:
                sqls = {x: prober.backend_sql(x, heavy) for x in households}
                alone = figures(measure(lambda x: prober.direct.execute(sqls[x]).fetchall(),
                                        households, repeats, rng), garden)
                cells += [f"{alone.accuracy:.0%}", f"{alone.gap_ms:+.3f}",
                          f"{alone.median_ms:.2f}"]
        table.add_row(label, str(size), *cells)
    return table


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--backend", help="admin DSN of a PostgreSQL server to use")
    parser.add_argument("--households", type=int, default=3000)
    parser.add_argument("--repeats", type=int, default=5, help="questions per household")
    parser.add_argument("--steady-ms", type=int, default=150,
                        help="steady answer time of the second proxy (0: skip it)")
    parser.add_argument("--shapes", help="comma-separated shape names (default: all)")
    args = parser.parse_args()
    if not 16 <= args.households <= 1_000_000 or not 1 <= args.repeats <= 50 \
            or not 0 <= args.steady_ms <= 5000:
        parser.error("households 16..1000000, repeats 1..50, steady-ms 0..5000")
    shapes = [s.strip() for s in args.shapes.split(",")] if args.shapes else list(SHAPES)
    unknown = [s for s in shapes if s not in SHAPES]
    if unknown:
        parser.error(f"unknown shapes {unknown}; known: {', '.join(SHAPES)}")
    console = Console(width=None if sys.stdout.isatty() else 150)
    began = time.perf_counter()
    folder = Path(tempfile.mkdtemp(prefix="hushql-bench-timing-"))
    server = None
    admin: str | None = args.backend
    database: str | None = None
    started: list = []
    try:
        if admin is None:
            with console.status("starting a private PostgreSQL"):
                server = start_local_postgres(folder / "pg")
            admin = server.dsn
        database, dsn = create_database(admin)
        from proxy.demo import load_scenario

        with console.status("loading the demo scenario"):
            load_scenario(dsn, households=args.households, progress=False)
        garden = pick_households(dsn, seed=2026)
        runs = [("default limits", generous_policies(folder / "plain"), True)]
        if args.steady_ms:
            runs.append((f"steady answer time {args.steady_ms} ms",
                         steady_policies(folder / "steady", args.steady_ms), False))
        for title, policies, direct in runs:
            proxy = start_proxy_subprocess(policies, dsn, 4, 16, folder / f"{len(started)}.log",
                                           None)
            started.append(proxy)
            prober = Prober(proxy.host, proxy.port, dsn)
            try:
                console.print(probe_all(console, prober, garden, args.repeats, shapes,
                                        f"{title}: {args.households} households, 16 probed "
                                        f"({args.repeats} times each)", direct))
            finally:
                prober.close()
                proxy.stop()
        console.print(f"targets: at most {TARGET_ACCURACY:.0%} right (chance 50%) and a median gap "
                      f"under {TARGET_GAP_MS:.0f} ms; benchmark took "
                      f"{time.perf_counter() - began:.0f} s", highlight=False)
    finally:
        for proxy in started:
            proxy.stop()
        if database is not None and admin is not None:
            try:
                if server is None:
                    drop_catalog_mirrors(generous_policies(folder / "drop"),
                                         with_database(admin, database))
                drop_database(admin, database)
            except psycopg.Error as error:
                console.print(f"could not drop database {database}: {type(error).__name__}")
        if server is not None:
            server.stop()
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
