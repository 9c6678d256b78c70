"""Exact discrete Laplace noise (the geometric mechanism) and its accuracy figures.

Why exact: floating-point Laplace samplers leak through the low bits of their output (Mironov
2012, "On Significance of the Least Significant Bits for Differential Privacy"). Integer-valued
aggregates therefore get integer noise ``Z`` with ``P(Z = z)`` proportional to
``exp(-|z| / scale)``, the geometric mechanism (Ghosh, Roughgarden & Sundararajan 2009,
"Universally Utility-Maximizing Privacy Mechanisms"). With ``scale = sensitivity / epsilon``
this is epsilon-differentially private for an integer query of that L1 sensitivity.

Sampling follows Canonne, Kamath & Steinke 2020, "The Discrete Gaussian for Differential
Privacy" (NeurIPS 2020), using only integer arithmetic on uniform integers drawn by rejection
from the operating system's CSPRNG (``os.urandom``). Nothing on the sampling path uses floating
point, and no pseudo-random generator (numpy's or ``random``'s) is used anywhere.

Algorithm 1 of the paper, Bernoulli(exp(-gamma)) for a rational ``0 <= gamma <= 1`` (the only
range needed here)::

    K <- 1
    loop: draw A ~ Bernoulli(gamma / K); if A = 0 stop, else K <- K + 1
    return 1 if K is odd else 0

where Bernoulli(p / q), p and q integers, is ``1`` exactly when a uniform integer in
``[0, q)`` is below ``p``.

Algorithm 2 of the paper, discrete Laplace with scale ``t / s`` (``t``, ``s`` positive
integers; here ``t = scale.numerator``, ``s = scale.denominator``)::

    loop:
        draw U uniform in {0, ..., t - 1}
        draw D ~ Bernoulli(exp(-U / t));   if D = 0, restart
        V <- 0; loop: draw A ~ Bernoulli(exp(-1)); if A = 0 stop, else V <- V + 1
        X <- U + t * V                      # P(X = x) proportional to exp(-x / t)
        Y <- floor(X / s)                   # P(Y = y) proportional to exp(-y * s / t)
        draw B ~ Bernoulli(1/2)
        if B = 1 and Y = 0, restart         # so that zero is not counted twice
        return (1 - 2B) * Y

Vectorisation: the same steps run on numpy ``int64`` lanes. Each loop of the algorithm becomes
rounds over the lanes still inside it (all lanes of one round of Algorithm 1 share the same
``K``), and the outer restart loop draws a batch of independent candidates and keeps the
accepted ones in order, which leaves them independent and identically distributed. Uniform
integers in ``[0, n)`` come from 64-bit words of OS randomness: words below ``2**64 mod n`` are
rejected, so the rest cover ``[0, n)`` a whole number of times and ``word mod n`` is exactly
uniform. Where ``t * K`` would not fit in 63 bits, Bernoulli(gamma / K) is drawn as the product
of independent Bernoulli(U / t) and Bernoulli(1 / K), which has the same probability. Lanes
whose ``U + t * V`` would overflow ``int64`` are finished with Python integers. Scales whose
numerator or denominator reach ``2**62``, or that are ``2**53`` or more, use a pure-Python-int
implementation of the same algorithm (slower, unbounded integers).

Accuracy figures (:func:`bound`, :func:`variance`) describe this exact distribution; they may
use floating point or decimals since they are computed from the public scale, never from data.
"""

from __future__ import annotations

import math
import operator
import os
from decimal import (
    MAX_EMAX,
    MIN_EMIN,
    ROUND_CEILING,
    Context,
    Decimal,
    DivisionByZero,
    InvalidOperation,
    Overflow,
    localcontext,
)
from fractions import Fraction
from functools import lru_cache
from typing import Callable

import numpy as np

__all__ = ["sample_discrete_laplace", "bound", "bound95", "variance", "uniform_below", "bernoulli_exp"]

# The only source of randomness in this module: n bytes from the operating system's CSPRNG.
# Looked up at call time so tests can substitute a deterministic stream.
_random_bytes: Callable[[int], bytes] = os.urandom

_INT64_MAX = (1 << 63) - 1
_WORD_RANGE = 1 << 64          # 64-bit words drawn from the byte source
_LARGEST_UNIFORM = 1 << 63     # uniform draws on int64 lanes stay below this
_LANE_LIMIT = 1 << 62          # scale numerator/denominator bound for the vectorised path
# Vectorised path only for scales below 2**53: then |Z| > 2**63 - 1 has probability about
# exp(-2**63 / 2**53) = exp(-1024), so the int64 result practically never needs widening.
_LANE_SCALE_LIMIT = Fraction(1 << 53)


# ---------------------------------------------------------------------------------------------
# Input checks
# ---------------------------------------------------------------------------------------------

def _exact_scale(scale: object) -> Fraction:
    """Return ``scale`` as a positive Fraction; reject inexact types (TypeError) and <= 0."""
    if isinstance(scale, bool) or not isinstance(scale, (Fraction, int, Decimal)):
        raise TypeError(
            f"scale must be an exact rational (fractions.Fraction, int or Decimal), "
            f"got {type(scale).__name__}"
        )
    if isinstance(scale, Decimal) and not scale.is_finite():
        raise ValueError(f"scale must be finite, got {scale}")
    value = Fraction(scale)
    if value <= 0:
        raise ValueError(f"scale must be positive, got {value}")
    return value


def _exact_confidence(confidence: object) -> Decimal:
    """Return ``confidence`` as a Decimal in (0, 1), reading a float as its shortest repr."""
    if isinstance(confidence, bool) or not isinstance(confidence, (float, int, Fraction, Decimal)):
        raise TypeError(f"confidence must be a number, got {type(confidence).__name__}")
    if isinstance(confidence, float):
        if not math.isfinite(confidence):
            raise ValueError(f"confidence must lie strictly between 0 and 1, got {confidence}")
        value = Decimal(repr(confidence))  # 0.95 means the decimal 0.95
    elif isinstance(confidence, Fraction):
        with localcontext(Context(prec=60)):
            value = Decimal(confidence.numerator) / Decimal(confidence.denominator)
    else:
        value = Decimal(confidence)
    if not (value.is_finite() and 0 < value < 1):
        raise ValueError(f"confidence must lie strictly between 0 and 1, got {confidence}")
    return value


# ---------------------------------------------------------------------------------------------
# Vectorised exact sampling on int64 lanes
# ---------------------------------------------------------------------------------------------

def _words(count: int) -> np.ndarray:
    """``count`` uniform 64-bit words from the byte source (little-endian, so reproducible)."""
    wanted = 8 * count
    data = _random_bytes(wanted)
    if len(data) != wanted:
        raise RuntimeError("the random byte source returned the wrong number of bytes")
    return np.frombuffer(data, dtype="<u8")


def _uniform_below(n: int, count: int) -> np.ndarray:
    """``count`` independent uniform integers in ``[0, n)`` as int64; needs 1 <= n <= 2**63."""
    if not 1 <= n <= _LARGEST_UNIFORM:
        raise ValueError(f"uniform range {n} outside [1, 2**63]")
    if n == 1 or count == 0:
        return np.zeros(count, dtype=np.int64)
    if n & (n - 1) == 0:  # a power of two divides 2**64: masking is exact, nothing rejected
        return (_words(count) & np.uint64(n - 1)).astype(np.int64)
    # Words in [2**64 mod n, 2**64) are a whole number of copies of [0, n) under "mod n".
    threshold = np.uint64(_WORD_RANGE % n)
    modulus = np.uint64(n)
    out = np.empty(count, dtype=np.int64)
    filled = 0
    while filled < count:
        words = _words(count - filled)
        kept = words[words >= threshold]
        out[filled:filled + kept.size] = (kept % modulus).astype(np.int64)
        filled += kept.size
    return out


def _bernoulli_ratio(num: np.ndarray, den: int, k: int) -> np.ndarray:
    """Per lane, Bernoulli(num / (den * k)) for int64 ``0 <= num <= den``; no int64 overflow."""
    if den * k <= _LARGEST_UNIFORM:
        return _uniform_below(den * k, num.size) < num
    # P(first and second) = (num / den) * (1 / k), each drawn without overflow.
    return (_uniform_below(den, num.size) < num) & (_uniform_below(k, num.size) < 1)


def _bernoulli_exp(num: np.ndarray, den: int) -> np.ndarray:
    """Per lane, Bernoulli(exp(-num / den)) for ``0 <= num <= den`` (CKS 2020, Algorithm 1)."""
    result = np.empty(num.size, dtype=bool)
    active = np.arange(num.size)
    k = 1
    while active.size:
        success = _bernoulli_ratio(num[active], den, k)
        result[active[~success]] = k % 2 == 1
        active = active[success]
        k += 1
    return result


def _successes_before_failure(count: int) -> np.ndarray:
    """Per lane, V = number of Bernoulli(exp(-1)) successes before the first failure."""
    v = np.zeros(count, dtype=np.int64)
    active = np.arange(count)
    while active.size:
        success = _bernoulli_exp(np.ones(active.size, dtype=np.int64), 1)
        active = active[success]
        v[active] += 1
    return v


def _candidates(t: int, s: int, count: int) -> np.ndarray:
    """One pass of CKS 2020 Algorithm 2 over ``count`` lanes; returns the accepted draws.

    dtype is int64, or object in the (practically impossible) case that a draw exceeds int64.
    """
    u = _uniform_below(t, count)
    u = u[_bernoulli_exp(u, t)]                       # D = 0 restarts: drop the lane
    v = _successes_before_failure(u.size)
    most_v = (_INT64_MAX - (t - 1)) // t              # U + t * V fits in int64 up to here
    wide = v > most_v
    x = u + np.where(wide, 0, v) * np.int64(t)
    y: np.ndarray = x // np.int64(s)
    if wide.any():                                    # finish overflowing lanes exactly
        y = y.astype(object)
        for i in np.flatnonzero(wide):
            y[i] = (int(u[i]) + t * int(v[i])) // s
    negative = _uniform_below(2, y.size) == 1         # B
    accepted = ~(negative & (y == 0))
    z = np.where(negative, -y, y)[accepted]
    if z.dtype == object and all(-_INT64_MAX <= value <= _INT64_MAX for value in z):
        z = z.astype(np.int64)
    return z


def _sample_lanes(t: int, s: int, size: int) -> np.ndarray:
    """``size`` exact draws of scale t/s on int64 lanes (object only if a draw overflows)."""
    out = np.empty(size, dtype=np.int64)
    filled = 0
    tried = accepted = 0
    while filled < size:
        need = size - filled
        # Batch size from the acceptance seen so far (integers only; at least 0.31 in theory).
        if accepted:
            batch = need * tried // accepted + need // 8 + 32
        else:
            batch = 2 * need + 32
        z = _candidates(t, s, batch)
        tried += batch
        accepted += z.size
        take = min(z.size, need)
        if z.dtype == object and out.dtype != object:
            out = out.astype(object)
        out[filled:filled + take] = z[:take]
        filled += take
    return out


# ---------------------------------------------------------------------------------------------
# Pure-Python-int path for scales too large for int64 lanes
# ---------------------------------------------------------------------------------------------

def _randbelow(n: int) -> int:
    """A uniform integer in ``[0, n)`` for any n >= 1, by rejection from the byte source."""
    if n == 1:
        return 0
    bits = (n - 1).bit_length()
    nbytes = (bits + 7) // 8
    excess = 8 * nbytes - bits
    while True:
        data = _random_bytes(nbytes)
        if len(data) != nbytes:
            raise RuntimeError("the random byte source returned the wrong number of bytes")
        value = int.from_bytes(data, "little") >> excess
        if value < n:
            return value


def _bernoulli_exp_int(num: int, den: int) -> bool:
    """Bernoulli(exp(-num / den)) for integers ``0 <= num <= den`` (CKS 2020, Algorithm 1)."""
    k = 1
    while _randbelow(den * k) < num:
        k += 1
    return k % 2 == 1


def _sample_one_int(t: int, s: int) -> int:
    """One exact draw of scale t/s with Python integers (CKS 2020, Algorithm 2)."""
    while True:
        u = _randbelow(t)
        if not _bernoulli_exp_int(u, t):
            continue
        v = 0
        while _bernoulli_exp_int(1, 1):
            v += 1
        y = (u + t * v) // s
        negative = _randbelow(2) == 1
        if negative and y == 0:
            continue
        return -y if negative else y


# ---------------------------------------------------------------------------------------------
# Public API
# ---------------------------------------------------------------------------------------------

# Up to this many draws, the int64-eligible path draws with Python ints instead of lanes.
_FEW_DRAWS = 16


def _uses_lanes(scale: Fraction) -> bool:
    """True when ``scale`` is sampled on int64 lanes (and the result is an int64 array)."""
    return (scale.numerator < _LANE_LIMIT and scale.denominator < _LANE_LIMIT
            and scale < _LANE_SCALE_LIMIT)


def sample_discrete_laplace(scale: Fraction, size: int) -> np.ndarray:
    """``size`` independent exact draws with ``P(Z = z)`` proportional to ``exp(-|z| / scale)``.

    ``scale`` must be an exact positive rational (Fraction, int or Decimal; floats are refused
    with TypeError because their binary value is not the scale the caller meant).

    Returns a numpy array of length ``size``: dtype int64 when the scale is below 2**53 and its
    numerator and denominator are below 2**62 (every realistic query); otherwise dtype object
    holding Python ints. An int64-eligible scale returns object only if a draw exceeds int64,
    which has probability about exp(-1024) per draw. All randomness comes from ``os.urandom``.
    """
    exact = _exact_scale(scale)
    try:
        count = operator.index(size)
    except TypeError:
        raise TypeError(f"size must be an integer, got {type(size).__name__}") from None
    if isinstance(size, bool) or count < 0:
        raise ValueError(f"size must be a non-negative integer, got {size!r}")
    t, s = exact.numerator, exact.denominator
    if _uses_lanes(exact):
        if count <= _FEW_DRAWS:
            # The lanes' fixed cost (~0.1 ms) dwarfs a few Python-int draws (~6 us each); the
            # algorithm and its randomness are the same.
            return np.array([_sample_one_int(t, s) for _ in range(count)], dtype=np.int64)
        return _sample_lanes(t, s, count)
    out = np.empty(count, dtype=object)
    for i in range(count):
        out[i] = _sample_one_int(t, s)
    return out


def _decimal_context(scale: Fraction) -> Context:
    """Decimal arithmetic wide enough for this scale's integer part plus 40 digits."""
    digits = len(str(scale.numerator // scale.denominator))
    return Context(prec=40 + digits, Emax=MAX_EMAX, Emin=MIN_EMIN,
                   traps=[InvalidOperation, DivisionByZero, Overflow])


@lru_cache(maxsize=4096)
def _bound(scale: Fraction, confidence: Decimal) -> int:
    """Smallest t >= 0 with P(|Z| <= t) >= confidence, in high-precision decimals."""
    with localcontext(_decimal_context(scale)):
        num, den = Decimal(scale.numerator), Decimal(scale.denominator)
        a = (-(den / num)).exp()                      # a = exp(-1/scale)
        allowed_tail = 1 - confidence

        def covers(k: int) -> bool:
            # P(|Z| > k) = 2 a^(k+1) / (1 + a) for this distribution.
            tail = 2 * (-(Decimal(k + 1) * den / num)).exp() / (1 + a)
            return tail <= allowed_tail

        # Closed form: (t + 1) / scale >= ln(2 / (1 + a)) - ln(1 - confidence).
        level = (2 / (1 + a)).ln() - allowed_tail.ln()
        guess = int((level * num / den).to_integral_value(rounding=ROUND_CEILING)) - 1
        guess = max(guess, 0)
        # Verify the boundary; rounding can only put the guess off by a step or so.
        while not covers(guess):
            guess += 1
        while guess > 0 and covers(guess - 1):
            guess -= 1
        return guess


def bound(scale: Fraction, confidence: float = 0.95) -> int:
    """Smallest integer t >= 0 with ``P(|Z| <= t) >= confidence`` for this discrete noise.

    With ``a = exp(-1/scale)``, ``P(|Z| <= k) = 1 - 2 a^(k+1) / (1 + a)``; evaluated in
    decimals of ample precision and checked at t and t - 1, so it is exact for any scale.
    A float confidence is read as its shortest decimal (0.95 means 95/100).
    """
    return _bound(_exact_scale(scale), _exact_confidence(confidence))


def bound95(scale: Fraction) -> int:
    """The 95% bound reported with every noisy value: ``bound(scale, 0.95)``."""
    return bound(scale, 0.95)


def variance(scale: Fraction) -> float:
    """Variance of this discrete noise, ``2a / (1 - a)^2`` with ``a = exp(-1/scale)``, as a float.

    Evaluated as ``1 / (2 sinh(1/(2 scale))^2)`` (the same quantity) to stay accurate for
    large scales; ``inf`` once it exceeds the float range (scale above about 1e154), and it
    underflows towards 0.0 for scales below about 0.0014.
    """
    x = float(1 / _exact_scale(scale))
    if x >= 1.0:
        a = math.exp(-x)
        return 2.0 * a / (1.0 - a) ** 2
    half = math.sinh(x / 2.0)
    if half == 0.0:
        return math.inf
    return 0.5 / half / half


def uniform_below(n: int) -> int:
    """One uniform integer in ``[0, n)`` from the OS byte source, for any n >= 1 (exact)."""
    return _randbelow(n)


def bernoulli_exp(x: Fraction) -> bool:
    """Bernoulli(exp(-x)) for a rational ``x >= 0``, exactly: ``exp(-x)`` is the product of
    ``floor(x)`` draws of Bernoulli(exp(-1)) and one of Bernoulli(exp(-(x - floor(x)))) (CKS 2020,
    Algorithm 1 for each), stopping at the first failure."""
    if x < 0:
        raise ValueError("bernoulli_exp needs x >= 0")
    whole = x.numerator // x.denominator
    for _ in range(whole):
        if not _bernoulli_exp_int(1, 1):
            return False
    rest = x - whole
    return _bernoulli_exp_int(rest.numerator, rest.denominator)
