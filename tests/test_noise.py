"""Tests for proxy.noise: the exact discrete Laplace sampler and its accuracy figures.

Pure tests (no database). Statistical tests use fixed significance levels chosen from the math:
each chi-square goodness-of-fit test fails a correct sampler with probability 1e-4 (so about
1 run in 10,000 per test); the moment tests use 6 standard errors, which a correct sampler
exceeds with probability about 2e-9 under the normal approximation (central limit theorem).
"""

from __future__ import annotations

import hashlib
import math
import os
import random
import secrets
from decimal import Context, Decimal, localcontext
from fractions import Fraction

import numpy as np
import pytest
import scipy.stats
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from proxy import noise
from proxy.noise import bound, bound95, sample_discrete_laplace, variance

SIGNIFICANCE = 1e-4  # a correct sampler fails each goodness-of-fit test 1 time in 10,000
MOMENT_SIGMAS = 6    # two-sided normal tail beyond 6 SE: about 2e-9

# A scale with numerator above 2**61: the int64 lanes overflow in U + t*V for V >= 3
# (probability e^-3 per lane) and finish those lanes with Python ints.
OVERFLOW_LANE_SCALE = Fraction(2**61 + 1, 2**60)
# A scale with numerator above 2**62: sampled by the pure-Python-int implementation.
PYTHON_INT_SCALE = Fraction(2**62 + 3, 2**61)


def reference(scale: Fraction) -> scipy.stats.rv_discrete:
    """scipy's discrete Laplace with the same distribution as our noise at ``scale``.

    Source: scipy.stats.dlaplace documentation, pmf(k, a) = tanh(a/2) exp(-a|k|); with
    a = 1/scale that is proportional to exp(-|k|/scale), the distribution we sample.
    """
    return scipy.stats.dlaplace(1.0 / float(scale))


def goodness_of_fit_p(draws: np.ndarray, scale: Fraction) -> float:
    """Chi-square p-value of integer ``draws`` against scipy's dlaplace at ``scale``.

    Bins: every integer -K..K, plus the two tails (<= -K-1, >= K+1) pooled, with K the largest
    value keeping every expected count at least 5 (common practice for the chi-square
    approximation). No parameter is fitted, so the degrees of freedom are bins - 1.
    """
    values = np.asarray(draws).astype(np.int64)
    n = values.size
    dist = reference(scale)
    k = 0
    while n * dist.pmf(k + 1) >= 5 and n * dist.sf(k + 1) >= 5:
        k += 1
    probabilities = np.concatenate(
        [[dist.cdf(-k - 1)], dist.pmf(np.arange(-k, k + 1)), [dist.sf(k)]])
    expected = n * probabilities / probabilities.sum()
    assert expected.min() >= 5, "too few draws for this scale"
    observed = np.bincount(np.clip(values, -k - 1, k + 1) + k + 1, minlength=2 * k + 3)
    return float(scipy.stats.chisquare(observed, expected).pvalue)


def reference_moments(scale: Fraction) -> tuple[float, float]:
    """(variance, fourth moment) of the reference distribution, summed from scipy's pmf.

    The sum runs over |k| <= 60 * scale + 60; the rest has mass below exp(-60).
    """
    reach = int(60 * scale) + 60
    ks = np.arange(-reach, reach + 1, dtype=np.float64)
    pmf = reference(scale).pmf(ks)
    return float(np.sum(pmf * ks**2)), float(np.sum(pmf * ks**4))


# ---------------------------------------------------------------------------------------------
# Distribution: goodness of fit, and the checker's power against a broken mechanism
# ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("scale", [Fraction(1), Fraction(10, 3)], ids=["1", "10/3"])
def test_draws_fit_scipy_dlaplace(scale: Fraction) -> None:
    draws = sample_discrete_laplace(scale, 200_000)
    assert goodness_of_fit_p(draws, scale) > SIGNIFICANCE


@pytest.mark.parametrize("scale", [Fraction(1), Fraction(10, 3)], ids=["1", "10/3"])
@pytest.mark.parametrize("factor", [Fraction(11, 10), Fraction(10, 11)], ids=["x1.1", "/1.1"])
def test_checker_rejects_wrong_scale(scale: Fraction, factor: Fraction) -> None:
    # A broken mechanism: noise 10% too wide or too narrow. With 100,000 draws the chi-square
    # noncentrality is about 850-1100 (computed from scipy's pmf), so the same check at the
    # same significance rejects it with probability indistinguishable from 1.
    draws = sample_discrete_laplace(scale * factor, 100_000)
    assert goodness_of_fit_p(draws, scale) < SIGNIFICANCE


def test_overflowing_lanes_keep_the_distribution() -> None:
    draws = sample_discrete_laplace(OVERFLOW_LANE_SCALE, 100_000)
    assert draws.dtype == np.int64
    assert goodness_of_fit_p(draws, OVERFLOW_LANE_SCALE) > SIGNIFICANCE


def test_python_int_path_keeps_the_distribution() -> None:
    draws = sample_discrete_laplace(PYTHON_INT_SCALE, 30_000)
    assert draws.dtype == object
    assert all(type(value) is int for value in draws[:100])
    assert goodness_of_fit_p(draws, PYTHON_INT_SCALE) > SIGNIFICANCE


def test_signs_are_balanced() -> None:
    draws = sample_discrete_laplace(Fraction(10, 3), 200_000)
    positive, negative = int(np.sum(draws > 0)), int(np.sum(draws < 0))
    # Given the nonzero count m, positives ~ Binomial(m, 1/2): Var(positive - negative) = m.
    assert abs(positive - negative) <= MOMENT_SIGMAS * math.sqrt(positive + negative)


# ---------------------------------------------------------------------------------------------
# Variance
# ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("scale", [Fraction(1), Fraction(10, 3), Fraction(1240)],
                         ids=["1", "10/3", "1240"])
def test_sample_moments_match_variance(scale: Fraction) -> None:
    n = 200_000
    draws = sample_discrete_laplace(scale, n).astype(np.float64)
    sigma2, mu4 = reference_moments(scale)
    # variance(scale) is the exact variance of scipy's distribution (summed from its pmf).
    assert variance(scale) == pytest.approx(sigma2, rel=1e-9)
    # Var of the unbiased sample variance: (mu4 - sigma^4 (n-3)/(n-1)) / n, mu4 the
    # central fourth moment (standard result, stated from memory; the mean here is 0).
    se_variance = math.sqrt((mu4 - sigma2**2 * (n - 3) / (n - 1)) / n)
    assert abs(np.var(draws, ddof=1) - variance(scale)) <= MOMENT_SIGMAS * se_variance
    assert abs(np.mean(draws)) <= MOMENT_SIGMAS * math.sqrt(sigma2 / n)


@pytest.mark.parametrize("scale", [0.05, 0.5, 1.0, 10 / 3, 100.0, 1240.0])
def test_variance_matches_scipy(scale: float) -> None:
    # scipy.stats.dlaplace.var: 2 e^-a / (1 - e^-a)^2 with a = 1/scale.
    exact = Fraction(scale).limit_denominator(1000)
    assert variance(exact) == pytest.approx(reference(exact).var(), rel=1e-9)


@pytest.mark.parametrize("b", [1000, 10_000, 10**6])
def test_variance_tends_to_continuous_laplace(b: int) -> None:
    # Continuous Laplace(b) has variance 2 b^2 (Dwork & Roth 2014, The Algorithmic Foundations
    # of Differential Privacy, Definition 3.2; the item number is from memory).
    # Derived here: 2a/(1-a)^2 = 1 / (2 sinh^2(1/(2b))) and 1/sinh^2(y) = 1/y^2 - 1/3 + y^2/15
    # - ..., so the discrete variance is 2b^2 - 1/6 + 1/(120 b^2) - ..., i.e.
    # variance / (2 b^2) - 1 = -1/(12 b^2) + O(b^-4).
    relative_gap = variance(Fraction(b)) / (2 * b * b) - 1
    assert relative_gap == pytest.approx(-1 / (12 * b * b), rel=1e-2)
    # The first omitted term is 1/(120 b^2); allow it plus a few units of float rounding.
    slack = 1 / (120 * b * b) + 4 * math.ulp(2.0 * b * b)
    assert abs(variance(Fraction(b)) - (2 * b * b - 1 / 6)) <= slack


def test_variance_extremes() -> None:
    assert variance(Fraction(1, 100)) == pytest.approx(2 * math.exp(-100), rel=1e-12)
    assert variance(Fraction(10**200)) == math.inf
    assert variance(Fraction(10**100)) == pytest.approx(2e200, rel=1e-12)


# ---------------------------------------------------------------------------------------------
# The 95% bound
# ---------------------------------------------------------------------------------------------

BOUND_SCALES = [Fraction(1, 100), Fraction(1, 10), Fraction(1, 2), Fraction(1), Fraction(10, 3),
                Fraction(73, 10), Fraction(100), Fraction(1240), Fraction(12345678, 1000),
                Fraction(10**6), Fraction(10**9)]


def probability_within(scale: Fraction, t: int) -> float:
    """P(|Z| <= t) from scipy's dlaplace.cdf; 0 for t < 0."""
    if t < 0:
        return 0.0
    dist = reference(scale)
    return float(dist.cdf(t) - dist.cdf(-t - 1))


@pytest.mark.parametrize("scale", BOUND_SCALES, ids=str)
def test_bound95_is_the_smallest_covering_integer(scale: Fraction) -> None:
    t = bound95(scale)
    assert t >= 0
    assert probability_within(scale, t) >= 0.95
    assert probability_within(scale, t - 1) < 0.95


@pytest.mark.parametrize("scale", BOUND_SCALES + [Fraction(10**30)], ids=str)
def test_bound95_against_continuous_laplace_tail(scale: Fraction) -> None:
    # Continuous Laplace(b): P(|Y| >= t b) = exp(-t) (Dwork & Roth 2014, Fact 3.7), so its 95%
    # bound is b ln 20. Derived here for the discrete noise: t95 = ceil(b L) - 1 with
    # b L = b ln 20 + 1/2 - b ln cosh(1/(2b)) and 0 < b ln cosh(1/(2b)) <= 1/(8b); hence
    # -1/2 - 1/(8b) <= t95 - b ln 20 < 1/2, and in particular t95 <= ceil(b ln 20).
    with localcontext(Context(prec=80)):
        b = Decimal(scale.numerator) / Decimal(scale.denominator)
        continuous = b * Decimal(20).ln()
        t = bound95(scale)
        assert t <= int(continuous.to_integral_value(rounding="ROUND_CEILING"))
        gap = Decimal(t) - continuous
        assert -Decimal("0.5") - 1 / (8 * b) <= gap < Decimal("0.5")


# scipy's cdf computes exp(1/scale), which overflows to inf (harmlessly) for tiny scales.
@pytest.mark.filterwarnings("ignore:overflow encountered in exp:RuntimeWarning")
@settings(max_examples=150, deadline=None)
@given(numerator=st.integers(1, 10**7), denominator=st.integers(1, 10**4))
def test_bound95_boundary_property(numerator: int, denominator: int) -> None:
    scale = Fraction(numerator, denominator)
    t = bound95(scale)
    inside, below = probability_within(scale, t), probability_within(scale, t - 1)
    assert math.isfinite(inside) and math.isfinite(below)
    # Only where double precision can decide the question (scipy's cdf is a float).
    assume(abs(inside - 0.95) > 1e-12 and abs(below - 0.95) > 1e-12)
    assert inside >= 0.95 > below


@settings(max_examples=100, deadline=None)
@given(a=st.fractions(min_value=Fraction(1, 1000), max_value=10**6),
       b=st.fractions(min_value=Fraction(1, 1000), max_value=10**6))
def test_bound_is_monotone_in_scale(a: Fraction, b: Fraction) -> None:
    low, high = sorted((a, b))
    assert bound95(low) <= bound95(high)


@settings(max_examples=100, deadline=None)
@given(scale=st.fractions(min_value=Fraction(1, 100), max_value=10**5),
       c1=st.floats(0.001, 0.999), c2=st.floats(0.001, 0.999))
def test_bound_is_monotone_in_confidence(scale: Fraction, c1: float, c2: float) -> None:
    low, high = sorted((c1, c2))
    assert bound(scale, low) <= bound(scale, high)


def test_bound_small_confidence_and_tiny_scale() -> None:
    # P(|Z| <= 0) = tanh(1/(2 scale)) (scipy's pmf at 0); for scale 1 that is 0.4621...
    assert bound(Fraction(1), 0.46) == 0
    assert bound(Fraction(1), 0.47) == 1
    assert bound95(Fraction(1, 10**30)) == 0


# ---------------------------------------------------------------------------------------------
# Sampler contract
# ---------------------------------------------------------------------------------------------

@settings(max_examples=60, deadline=None)
@given(numerator=st.integers(1, 10**9), denominator=st.integers(1, 10**9),
       size=st.integers(0, 40))
def test_sampler_returns_int64_of_requested_size(numerator: int, denominator: int,
                                                 size: int) -> None:
    draws = sample_discrete_laplace(Fraction(numerator, denominator), size)
    assert draws.dtype == np.int64
    assert draws.shape == (size,)


def test_size_zero() -> None:
    assert sample_discrete_laplace(Fraction(3), 0).shape == (0,)
    assert sample_discrete_laplace(Fraction(3), 0).dtype == np.int64
    assert sample_discrete_laplace(Fraction(10**30), 0).dtype == object


def test_huge_scale_gives_python_ints() -> None:
    draws = sample_discrete_laplace(Fraction(10**30), 200)
    assert draws.dtype == object
    assert all(type(value) is int for value in draws)
    # |Z| <= 10**27 has probability about 1e-3 per draw at scale 1e30, so not for all 200.
    assert max(abs(value) for value in draws) > 10**27


def test_scale_from_decimal_epsilon_is_exact() -> None:
    # The engine passes Fraction(sensitivity) / Fraction(Decimal epsilon).
    scale = Fraction(124) / Fraction(Decimal("0.1"))
    assert scale == 1240
    assert sample_discrete_laplace(scale, 10).dtype == np.int64
    assert bound95(scale) == bound95(Fraction(1240))


@pytest.mark.parametrize("scale", [Fraction(0), Fraction(-1, 2), -3, Decimal("-0.1")])
def test_nonpositive_scale_is_refused(scale: object) -> None:
    with pytest.raises(ValueError):
        sample_discrete_laplace(scale, 1)  # type: ignore[arg-type]
    with pytest.raises(ValueError):
        bound95(scale)  # type: ignore[arg-type]
    with pytest.raises(ValueError):
        variance(scale)  # type: ignore[arg-type]


@pytest.mark.parametrize("scale", [1.5, True, "2", None, Decimal("NaN")])
def test_inexact_scale_is_refused(scale: object) -> None:
    with pytest.raises((TypeError, ValueError)):
        sample_discrete_laplace(scale, 1)  # type: ignore[arg-type]


@pytest.mark.parametrize("size", [-1, -100])
def test_negative_size_is_refused(size: int) -> None:
    with pytest.raises(ValueError):
        sample_discrete_laplace(Fraction(1), size)


def test_non_integer_size_is_refused() -> None:
    with pytest.raises(TypeError):
        sample_discrete_laplace(Fraction(1), 2.5)  # type: ignore[arg-type]


@pytest.mark.parametrize("confidence", [0, 1, 0.0, 1.0, -0.5, 1.5, math.nan, math.inf])
def test_confidence_outside_unit_interval_is_refused(confidence: float) -> None:
    with pytest.raises(ValueError):
        bound(Fraction(1), confidence)


# ---------------------------------------------------------------------------------------------
# Randomness comes only from the module's OS byte source
# ---------------------------------------------------------------------------------------------

class CountingStream:
    """A deterministic byte stream (SHA-256 in counter mode) standing in for os.urandom."""

    def __init__(self, seed: bytes) -> None:
        self.seed = seed
        self.counter = 0
        self.buffer = b""
        self.bytes_served = 0

    def __call__(self, n: int) -> bytes:
        while len(self.buffer) < n:
            block = hashlib.sha256(self.seed + self.counter.to_bytes(8, "little")).digest()
            self.buffer += block
            self.counter += 1
        out, self.buffer = self.buffer[:n], self.buffer[n:]
        self.bytes_served += n
        return out


def _forbid(*_args: object, **_kwargs: object) -> None:
    raise AssertionError("a random source other than noise._random_bytes was used")


@pytest.fixture
def only_patched_bytes(monkeypatch: pytest.MonkeyPatch) -> pytest.MonkeyPatch:
    """Make every other randomness source in reach fail loudly."""
    for name in ("default_rng", "random", "randint", "integers", "geometric", "laplace",
                 "RandomState", "Generator", "seed"):
        if hasattr(np.random, name):
            monkeypatch.setattr(np.random, name, _forbid)
    for name in ("randbelow", "randbits", "token_bytes", "choice"):
        monkeypatch.setattr(secrets, name, _forbid)
    for name in ("random", "getrandbits", "randrange", "randint"):
        monkeypatch.setattr(random, name, _forbid)
    monkeypatch.setattr(os, "urandom", _forbid)
    return monkeypatch


def test_default_source_is_os_urandom() -> None:
    assert noise._random_bytes is os.urandom


@pytest.mark.parametrize("scale", [Fraction(1240), PYTHON_INT_SCALE], ids=["lanes", "python-int"])
def test_output_is_a_function_of_the_byte_stream(only_patched_bytes: pytest.MonkeyPatch,
                                                 scale: Fraction) -> None:
    runs = []
    for seed in (b"first", b"first", b"second"):
        stream = CountingStream(seed)
        only_patched_bytes.setattr(noise, "_random_bytes", stream)
        runs.append(sample_discrete_laplace(scale, 500))
        assert stream.bytes_served > 0
    assert np.array_equal(runs[0], runs[1])       # same bytes, same noise
    assert not np.array_equal(runs[0], runs[2])   # other bytes, other noise


def test_short_read_from_the_source_fails_closed(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(noise, "_random_bytes", lambda n: b"\x00" * (n - 1))
    with pytest.raises(RuntimeError):
        sample_discrete_laplace(Fraction(10, 3), 10)
    with pytest.raises(RuntimeError):
        sample_discrete_laplace(PYTHON_INT_SCALE, 1)


def test_few_draws_follow_the_same_distribution() -> None:
    """Calls for a handful of cells take the Python-int path; pooled over many such calls, the
    draws must fit scipy.stats.dlaplace exactly as the vectorised path's do."""
    scale = Fraction(10, 3)
    draws = np.concatenate([noise.sample_discrete_laplace(scale, 3) for _ in range(34_000)])
    assert draws.dtype == np.int64 and len(draws) == 102_000
    assert goodness_of_fit_p(draws, scale) > SIGNIFICANCE
