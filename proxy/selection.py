"""Percentiles chosen privately: the exponential mechanism over a histogram, sampled exactly.

What the proxy holds per cell: a histogram ``h_0, ..., h_{K-1}`` of the column's values in step
buckets (candidate k is the bucket's lower edge, a multiple of the step in the declared range),
from the backend (``proxy.sql.rewrite``, "Percentiles"). It never releases the histogram.

Utility. Sorted, the values of bucket k hold the 0-based positions ``[a_k, b_k - 1]`` with
``a_k = h_0 + ... + h_{k-1}`` and ``b_k = a_k + h_k``. The requested position is ``t = p (n - 1)``
for percentile_cont (the position PostgreSQL interpolates at) and ``t = max(0, ceil(p n) - 1)``
for percentile_disc (the value PostgreSQL returns), ``n = b_{K-1}``. A candidate's distance is
``d_k = max(a_k - t, t - (b_k - 1), 0)``: 0 exactly when the requested position falls in its
bucket, and for an empty bucket at least 1/2 from every position. The mechanism picks k with
probability proportional to ``exp(-epsilon * d_k / (2 Delta))`` (McSherry & Talwar 2007; Smith
2011 for quantiles).

Sensitivity. Neighbouring databases differ by one row (row tables) or by one individual's
scaled rows (``proxy.sql.rewrite``: the individual's counts, scaled by its factor, add up over
all cells and buckets to at most R). Let the histogram of one cell gain nonnegative counts adding
up to ``D`` (removing is the same read backwards). Then ``a_k``, ``b_k`` and ``n`` each grow by
an amount in ``[0, D]``, and t by ``p * (change of n)`` (cont) or by
``ceil(p (n + m)) - ceil(p n)``, which lies in ``[0, m]`` for a growth m of n (disc): both
``a_k - t`` and ``t - (b_k - 1)`` move by at most D, so ``d_k`` moves by at most D. With
``Delta`` = 1 (row tables: D = 1 in the one cell the row is in) or R (individuals: the D of all
cells add up to at most R):

  Proof (epsilon-DP of all cells' choices together). In cell c with growth D_c, each weight
  ``exp(-epsilon d_k / (2 Delta))`` changes by a factor within ``exp(+-epsilon D_c / (2 Delta))``,
  and so does their sum, so each choice's probability changes by a factor within
  ``exp(+-epsilon D_c / Delta)``. The cells' choices are independent given the data, so the
  whole answer's probability changes by at most ``exp(epsilon sum_c D_c / Delta) <=
  exp(epsilon)``. Several percentiles of one histogram each spend their own epsilon (basic
  composition); the engine splits the query's epsilon among them.

Exact sampling, no floating point. Shift the distances by their minimum m (the weights keep their
ratios), then repeat: draw k uniformly among the K candidates (a uniform integer from the OS byte
source) and accept it with probability ``exp(-gamma (d_k - m))``, ``gamma = epsilon / (2 Delta)``,
a rational, by exact Bernoulli(exp(-x)) sampling (``proxy.noise.bernoulli_exp``, Canonne, Kamath
& Steinke 2020). An accepted k has probability ``w_k / sum w`` (rejection sampling with a
uniform proposal); the minimum's weight is 1, so each round accepts with probability at least
1/K and the expected number of rounds is at most K (``MOST_PERCENTILE_CANDIDATES`` in
``proxy.sql.analyse`` bounds K). The number of rounds depends on the data (on the sum of the
weights), so the time a selection takes does too: tables that must not show data in answer
times declare a steady answer time (``[timing]``), which covers it.

Accuracy (public, from epsilon, Delta and K only). For any ``s > 0`` the chosen candidate has
``d_k >= m + (2 Delta / epsilon)(ln K + s)`` with probability at most ``exp(-s)`` (the weight of
all such candidates is at most ``K exp(-(ln K + s))`` against a total of at least 1). With
``s = ln 20`` and ``m = 0`` (every position in ``[0, n - 1]`` lies in some bucket, n >= 1):
in 95% of answers the value returned is the lower edge of a bucket holding a position within
``rank_bound95`` of the requested one.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from fractions import Fraction
from typing import Sequence

from proxy import noise


def distances(histogram: Sequence[int], fraction: Fraction, discrete: bool) -> Gaps:
    """Each candidate bucket's distance ``d_k`` from the requested position (module notes), as
    integers over one common denominator (exact, and cheap for tens of thousands of buckets).

    Negative counts cannot come from the backend; they are read as 0."""
    counts = [max(0, int(h)) for h in histogram]
    n = sum(counts)
    if discrete:
        scale, target = 1, max(0, math.ceil(fraction * n) - 1)
    else:  # t = p (n - 1), times the denominator of p
        scale, target = fraction.denominator, fraction.numerator * (n - 1)
    result = []
    below = 0
    for count in counts:
        last = below + count - 1  # the bucket's last position (below - 1 when empty)
        result.append(max(below * scale - target, target - last * scale, 0))
        below += count
    return Gaps(tuple(result), scale)


@dataclass(frozen=True)
class Gaps:
    """Distances ``d_k = scaled[k] / denominator``."""

    scaled: tuple[int, ...]
    denominator: int

    def __getitem__(self, k: int) -> Fraction:
        return Fraction(self.scaled[k], self.denominator)


def choose(gaps: Gaps, epsilon: Fraction, sensitivity: int) -> int:
    """The index k drawn with probability proportional to ``exp(-epsilon d_k / (2 sensitivity))``,
    exactly (module notes); needs at least one candidate."""
    if not gaps.scaled:
        raise ValueError("no candidates to choose among")
    if epsilon <= 0 or sensitivity < 1:
        raise ValueError("epsilon must be positive and the sensitivity at least 1")
    gamma = Fraction(epsilon) / (2 * sensitivity * gaps.denominator)
    least = min(gaps.scaled)
    count = len(gaps.scaled)
    while True:
        k = noise.uniform_below(count)
        if noise.bernoulli_exp(gamma * (gaps.scaled[k] - least)):
            return k


def rank_bound95(candidates: int, epsilon: Fraction, sensitivity: int) -> int:
    """Positions, at most, between the requested position and the chosen bucket in 95% of
    answers: ``ceil((2 Delta / epsilon) ln(20 K))`` (module notes; computed from public
    figures, so floating point is harmless here, and rounded up)."""
    return math.ceil(2 * sensitivity / float(epsilon) * math.log(20 * max(1, candidates)) + 1e-9)
