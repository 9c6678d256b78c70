"""Set-up shared by the benchmark scripts."""

from __future__ import annotations

import re
import shutil
import statistics
import subprocess
import time
from collections.abc import Callable
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
GENEROUS = "1000000.0"  # epsilon: far more than any benchmark run spends (0.1 per query)
# Every account of the copy gets this password: `hushql serve` refuses the demo's published ones.
BENCH_PASSWORD = "benchmark-only-password"
LOGIN_LIMITS = {"most_logins_in_progress_per_address": 128, "most_logins_in_progress": 256,
                "login_timeout_seconds": 60, "failed_logins_allowed": 1000}


def generous_policies(folder: Path) -> Path:
    """A copy of the demo policies in ``folder`` with every analyst budget and table cap raised
    to GENEROUS, so repeated benchmark queries never run out, every password set to
    BENCH_PASSWORD and the login limits raised (LOGIN_LIMITS); returns the copy's path."""
    from proxy.wire.auth import make_verifier

    target = folder / "policies"
    shutil.copytree(ROOT / "policies", target)
    budget_line = re.compile(r"^(\s*(?:budget|cap)\s*=\s*)[0-9.]+", re.MULTILINE)
    for path in [target / "access.toml", *sorted((target / "tables").glob("*.toml"))]:
        path.write_text(budget_line.sub(rf"\g<1>{GENEROUS}", path.read_text()))
    access = target / "access.toml"
    text = re.sub(r'^password = "[^"]*"', f'password = "{make_verifier(BENCH_PASSWORD)}"',
                  access.read_text(), flags=re.MULTILINE)
    # Dozens of clients log in at once from one address on a possibly loaded machine: the
    # benchmarks measure answers, so the login limits must not be what refuses them.
    for key, value in LOGIN_LIMITS.items():
        text = re.sub(rf"(?m)^{key} = \d+", f"{key} = {value}", text)
    access.write_text(text)
    return target


def median_ms(action: Callable[[], object], repeat: int, warmup: int = 2) -> float:
    """Median wall time of ``action`` in milliseconds over ``repeat`` runs, after ``warmup``."""
    for _ in range(warmup):
        action()
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        action()
        times.append((time.perf_counter() - start) * 1000)
    return statistics.median(times)


def serve(policies: Path, dsn: str, log: Path, *, workers: int = 1, pool_size: int = 8
          ) -> tuple["subprocess.Popen[bytes]", int]:
    """``hushql serve`` on a free port with ``policies`` over ``dsn``, its stderr in ``log``;
    returns the process and the port once the planner can log in (SystemExit after 60 s)."""
    import subprocess
    import sys

    import psycopg

    from proxy.localpg import free_port

    port = free_port()
    with open(log, "wb") as out:
        proxy = subprocess.Popen(
            [sys.executable, "-m", "proxy.cli", "serve", "--workers", str(workers), "--policies",
             str(policies), "--backend", dsn, "--listen", f"127.0.0.1:{port}", "--pool-size",
             str(pool_size)], cwd=ROOT, stderr=out, stdout=subprocess.DEVNULL)
    deadline = time.monotonic() + 60
    while True:
        try:
            psycopg.connect(host="127.0.0.1", port=port, user="planner", password=BENCH_PASSWORD,
                            dbname="hushql_demo", connect_timeout=2).close()
            # With several workers, wait for all: clients connecting while one is still
            # starting would all land on the others and stay there.
            if workers == 1 or log.read_text(errors="replace").count("serving (pid") >= workers:
                return proxy, port
        except psycopg.OperationalError:
            pass
        if proxy.poll() is not None or time.monotonic() > deadline:
            proxy.kill()
            raise SystemExit(f"the proxy did not start; its log: {log}") from None
        time.sleep(0.2)


def set_up(backend: str, purpose: str) -> tuple[Path, str, str]:
    """A fresh folder and an empty database ``hushql_<purpose>_<random>`` on the server
    ``backend`` names: (folder, database name, its DSN). ``tear_down`` removes both."""
    import tempfile
    import uuid

    import psycopg
    from psycopg import sql

    from proxy.dsn import with_database

    folder = Path(tempfile.mkdtemp(prefix=f"hushql-{purpose}-"))
    name = f"hushql_{purpose}_{uuid.uuid4().hex[:8]}"
    with psycopg.connect(backend, autocommit=True) as conn:
        conn.execute(sql.SQL("CREATE DATABASE {}").format(sql.Identifier(name)))
    return folder, name, with_database(backend, name)


def tear_down(proxy: "subprocess.Popen[bytes] | None", folder: Path, backend: str, dsn: str,
              database: str) -> None:
    """Stops a served proxy, drops its catalog mirrors and the benchmark's own database (on the
    server ``backend`` names), and removes its folder."""
    import psycopg
    from psycopg import sql

    from benchmarks.bench_wire import drop_catalog_mirrors

    if proxy is not None:
        proxy.terminate()
        proxy.wait(30)
    drop_catalog_mirrors(folder / "policies", dsn)
    with psycopg.connect(backend, autocommit=True) as conn:
        conn.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(
            sql.Identifier(database)))
    shutil.rmtree(folder, ignore_errors=True)
