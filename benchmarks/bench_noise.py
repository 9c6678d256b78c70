"""Benchmark: exact discrete Laplace noise for 10,000 cells (median milliseconds per call).

The scales are those of typical answers: 1 (a row-table COUNT at epsilon 1), 1240 (a COUNT
on the demo readings table with a row bound of 124 at epsilon 0.1) and
1e6 (a wide SUM). The target is well under
50 ms per 10,000 cells. Run: ``python benchmarks/bench_noise.py``.
"""

from __future__ import annotations

import statistics
import time
from decimal import Decimal
from fractions import Fraction

from proxy.noise import sample_discrete_laplace

CELLS = 10_000
RUNS = 30
SCALES: dict[str, Fraction] = {
    "scale 1": Fraction(1),
    "scale 31*4/0.1": Fraction(31 * 4) / Fraction(Decimal("0.1")),
    "scale 1e6": Fraction(10**6),
}


def bench_noise(cells: int = CELLS, runs: int = RUNS) -> dict[str, float]:
    """Median milliseconds to draw ``cells`` noise values, per scale label in SCALES."""
    results: dict[str, float] = {}
    for label, scale in SCALES.items():
        sample_discrete_laplace(scale, cells)  # warm-up: imports, allocator
        timings = []
        for _ in range(runs):
            start = time.perf_counter()
            sample_discrete_laplace(scale, cells)
            timings.append((time.perf_counter() - start) * 1000.0)
        results[label] = statistics.median(timings)
    return results


def main() -> None:
    """Print the medians as a small table."""
    results = bench_noise()
    print(f"exact discrete Laplace, {CELLS:,} cells, median of {RUNS} runs")
    print(f"{'scale':<18}{'ms':>10}{'us/cell':>10}")
    for label, ms in results.items():
        print(f"{label.removeprefix('scale '):<18}{ms:>10.2f}{ms * 1000 / CELLS:>10.3f}")


if __name__ == "__main__":
    main()
