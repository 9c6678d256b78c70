"""Set-up shared by the benchmark scripts."""

from __future__ import annotations

import re
import shutil
import statistics
import time
from collections.abc import Callable
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
GENEROUS = "1000000.0"  # epsilon: far more than any benchmark run spends (0.1 per query)
# Every account of the copy gets this password: `hushql serve` refuses the demo's published ones.
BENCH_PASSWORD = "benchmark-only-password"


def generous_policies(folder: Path) -> Path:
    """A copy of the demo policies in ``folder`` with every analyst budget and table cap raised
    to GENEROUS, so repeated benchmark queries never run out, and every password set to
    BENCH_PASSWORD; returns the copy's path."""
    from proxy.wire.auth import make_verifier

    target = folder / "policies"
    shutil.copytree(ROOT / "policies", target)
    budget_line = re.compile(r"^(\s*(?:budget|cap)\s*=\s*)[0-9.]+", re.MULTILINE)
    for path in [target / "access.toml", *sorted((target / "tables").glob("*.toml"))]:
        path.write_text(budget_line.sub(rf"\g<1>{GENEROUS}", path.read_text()))
    access = target / "access.toml"
    access.write_text(re.sub(r'^password = "[^"]*"', f'password = "{make_verifier(BENCH_PASSWORD)}"',
                             access.read_text(), flags=re.MULTILINE))
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
