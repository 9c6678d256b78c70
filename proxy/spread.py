"""Variance and standard deviation from a noisy count, centred sum and centred sum of squares.

Post-processing only (``proxy.sql.rewrite``, "Spread", says how the three measures are made
private). With C values, centred sum S and centred squares Q (step units, centre c), the sample
variance of the values is ``(Q - S^2 / C) / (C - 1)`` and the population variance
``(Q - S^2 / C) / C``: the same for any centre. On noisy parts the estimate is clamped to
``[0, (hi - lo)^2 / 4]``, the largest variance values inside the range can have (half of them
at each end); the standard deviation is its square root.

The 95% bound (interval propagation, conservative). Each part's noise is independent discrete
Laplace; each part is widened by its two-sided ``1 - 0.05 / 3`` bound, so that all three true
parts lie in their intervals together in at least 95% of answers (union bound). The true
variance is then within the range of the formula over that box, computed with interval
arithmetic on exact fractions (every step is monotone in each part over the box once
``C - 1 > 0`` on all of it) and clamped like the estimate; the bound is the larger distance from
the estimate to that range's ends. Where the count's interval reaches down to the divisor's zero,
the bound is the whole clamped range. This covers the noise only: values outside the declared
range count as its nearest end, and contribution bounds may have scaled individuals down.
"""

from __future__ import annotations

import math
from fractions import Fraction

from proxy import noise

# Each of the three parts is bounded at this confidence, so the three hold together at 95%.
PART_CONFIDENCE = 1 - 0.05 / 3


def largest_variance(low: int, high: int) -> Fraction:
    """The largest variance values in [low, high] can have, ``(high - low)^2 / 4``."""
    return Fraction((high - low) ** 2, 4)


def variance(count: int, total: int, squares: int, sample: bool, cap: Fraction) -> Fraction | None:
    """The clamped variance estimate in squared step units; None when the count leaves no
    divisor (at most 1 for a sample variance, at most 0 for a population variance)."""
    divisor = count - 1 if sample else count
    if divisor <= 0:
        return None
    return min(cap, max(Fraction(0), (squares - Fraction(total * total, count)) / divisor))


def variance_range(count: int, total: int, squares: int, widths: tuple[int, int, int],
                   sample: bool, cap: Fraction) -> tuple[Fraction, Fraction]:
    """Where the variance lies when each part is within its width of the noisy value."""
    wc, ws, wq = widths
    c_low, c_high = count - wc, count + wc
    shift = 1 if sample else 0
    if c_low - shift <= 0:
        return Fraction(0), cap
    s_low, s_high = total - ws, total + ws
    least_square = 0 if s_low <= 0 <= s_high else min(s_low * s_low, s_high * s_high)
    most_square = max(s_low * s_low, s_high * s_high)
    top_low = squares - wq - Fraction(most_square, c_low)
    top_high = squares + wq - Fraction(least_square, c_high)
    low = top_low / (c_high - shift if top_low >= 0 else c_low - shift)
    high = top_high / (c_low - shift if top_high >= 0 else c_high - shift)
    return min(cap, max(Fraction(0), low)), min(cap, max(Fraction(0), high))


def widths(scales: tuple[Fraction, Fraction, Fraction]) -> tuple[int, int, int]:
    """Each part's two-sided bound at ``PART_CONFIDENCE`` (``proxy.noise.bound``)."""
    return tuple(noise.bound(scale, PART_CONFIDENCE) for scale in scales)  # type: ignore[return-value]


def half_width(estimate: Fraction, span: tuple[Fraction, Fraction], root: bool) -> float:
    """The larger distance from the estimate to the span's ends (of their square roots for a
    standard deviation), in the same squared (or plain) step units."""
    if root:
        value = math.sqrt(estimate)
        return max(value - math.sqrt(span[0]), math.sqrt(span[1]) - value)
    return float(max(estimate - span[0], span[1] - estimate))
