"""Where the proxy's CPU goes on the path from message to answer, sampled with py-spy.

    .venv/bin/pip install py-spy          # the optional extra 'profile'
    .venv/bin/python benchmarks/profile_answer.py --backend ADMIN_DSN [--seconds 10]
        [--clients 4] [--stored] [--raw FILE]

Loads the demo into a database of its own on ``--backend``'s server (dropped at the end), runs
``hushql serve --workers 1`` on it with budgets no run exhausts, and has ``--clients`` threads
send ``SELECT COUNT(*) FROM households WHERE occupants = k`` (k varying) for ``--seconds``,
each answer fresh (``hushql.fresh = on``: planned, charged and noised, as in bench_load.py;
``--stored`` profiles stored answers given again instead), while py-spy samples the proxy thread holding the GIL (Python CPU work, not waits). Prints the proxy's
CPU time per answer (from /proc) and the functions holding the most samples, inclusive and
self. Nothing is asserted; the figures depend on the machine and on what else runs on it.
"""

from __future__ import annotations

import argparse
import collections
import os
import shutil
import subprocess
import sys
import threading
import time
from pathlib import Path

import psycopg

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.common import BENCH_PASSWORD, generous_policies, serve, set_up, tear_down  # noqa: E402

from proxy.demo import load_scenario  # noqa: E402


def cpu_seconds(pid: int) -> float:
    """User plus system CPU time of a process and its threads (Linux /proc)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def load(port: int, clients: int, seconds: float, fresh: bool) -> int:
    """Answers received by ``clients`` threads asking for ``seconds`` (``fresh``: each
    answer charged and noised anew)."""
    stop = time.monotonic() + seconds
    counts = [0] * clients

    def client(index: int) -> None:
        with psycopg.connect(host="127.0.0.1", port=port, user="planner",
                             password=BENCH_PASSWORD, dbname="hushql_demo",
                             autocommit=True,
                             options="-c hushql.fresh=on" if fresh else None) as conn:
            k = index
            while time.monotonic() < stop:
                conn.execute(f"SELECT COUNT(*) FROM households WHERE occupants = {k % 8 + 1}")
                counts[index] += 1
                k += 1

    threads = [threading.Thread(target=client, args=(i,)) for i in range(clients)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return sum(counts)


def summarise(raw: Path, top: int) -> None:
    """Inclusive and self sample shares per function from py-spy's collapsed stacks."""
    inclusive: collections.Counter[str] = collections.Counter()
    own: collections.Counter[str] = collections.Counter()
    total = 0
    for line in raw.read_text().splitlines():
        stack, _, count = line.rpartition(" ")
        if not count.isdigit():
            continue
        n = int(count)
        total += n
        frames = [f.split(" (", 1)[0] + " " + _where(f) for f in stack.split(";")[1:]]
        for frame in set(frames):
            inclusive[frame] += n
        if frames:
            own[frames[-1]] += n
    print(f"{total} samples of busy threads")
    for title, counter in (("inclusive", inclusive), ("self", own)):
        print(f"\n{title}:")
        for frame, n in counter.most_common(top):
            print(f"  {100 * n / total:5.1f}%  {frame}")


def _where(frame: str) -> str:
    """'(path/to/module.py:12)' -> 'module.py' (lines vary within a function)."""
    inside = frame.rpartition("(")[2].rstrip(")")
    return inside.rpartition(":")[0].rsplit("/", 1)[-1]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--backend", default=os.environ.get("HUSHQL_TEST_DSN"),
                        help="admin DSN of a PostgreSQL server (default HUSHQL_TEST_DSN)")
    parser.add_argument("--seconds", type=float, default=10.0)
    parser.add_argument("--clients", type=int, default=4)
    parser.add_argument("--top", type=int, default=30)
    parser.add_argument("--stored", action="store_true",
                        help="profile stored answers given again (hushql.fresh off)")
    parser.add_argument("--raw", type=Path, help="keep py-spy's collapsed stacks here")
    args = parser.parse_args()
    if not args.backend:
        parser.error("give --backend or set HUSHQL_TEST_DSN")
    py_spy = shutil.which("py-spy") or str(Path(sys.executable).parent / "py-spy")
    folder, name, dsn = set_up(args.backend, "profile")
    proxy = None
    try:
        load_scenario(dsn, households=3000, progress=False)
        proxy, port = serve(generous_policies(folder), dsn, folder / "serve.log", pool_size=8)
        load(port, args.clients, 2.0, not args.stored)  # warm the plan cache and the pools
        raw = args.raw or folder / "profile.txt"
        sampler = subprocess.Popen(
            [py_spy, "record", "--pid", str(proxy.pid), "--duration", str(int(args.seconds)),
             "--rate", "250", "--format", "raw", "--nonblocking", "--gil", "--output", str(raw)],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        before = cpu_seconds(proxy.pid)
        answers = load(port, args.clients, args.seconds, not args.stored)
        used = cpu_seconds(proxy.pid) - before
        sampler.wait(60)
        print(f"{answers} answers in {args.seconds:.0f} s with {args.clients} clients: "
              f"{answers / args.seconds:.0f}/s, proxy CPU {1000 * used / answers:.2f} ms "
              "per answer")
        summarise(raw, args.top)
    finally:
        tear_down(proxy, folder, args.backend, dsn, name)
    return 0


if __name__ == "__main__":
    sys.exit(main())
