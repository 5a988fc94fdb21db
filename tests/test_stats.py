"""agent.stats against published worked examples and scipy."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as sps

from agent.errors import DataError
from agent.stats import (binomial_lower_tail, binomial_upper_tail, bootstrap_mean_by_day, exposure_summary,
                         paired_bootstrap_by_day, quantile_type7, wilson_interval)


# -- Wilson -------------------------------------------------------------------------------
# Newcombe (1998), Stat. Med. 17:857-872, Table I, method 3 (Wilson score, no continuity
# correction), 95 % intervals to 4 decimals; from memory of the table.
@pytest.mark.parametrize("k, n, lo, hi", [
    (81, 263, 0.2553, 0.3662),
    (15, 148, 0.0624, 0.1605),
    (0, 20, 0.0, 0.1611),
    (1, 29, 0.0061, 0.1718),
    (29, 29, 0.8830, 1.0),
])
def test_wilson_matches_newcombe_1998_worked_examples(k, n, lo, hi):
    got = wilson_interval(k, n)
    assert got[0] == pytest.approx(lo, abs=5e-5)
    assert got[1] == pytest.approx(hi, abs=5e-5)


@pytest.mark.parametrize("k, n, level", [(0, 1, 0.95), (3, 7, 0.9), (50, 100, 0.99), (999, 1000, 0.95)])
def test_wilson_matches_scipy_binomtest_proportion_ci(k, n, level):
    # scipy.stats.binomtest(...).proportion_ci(method="wilson") as the reference library.
    ref = sps.binomtest(k, n).proportion_ci(confidence_level=level, method="wilson")
    got = wilson_interval(k, n, level=level)
    assert got == pytest.approx((ref.low, ref.high), abs=1e-12)


def test_wilson_empty_is_nan():
    assert all(math.isnan(v) for v in wilson_interval(0, 0))


def test_wilson_refuses_more_successes_than_trials():
    with pytest.raises(ValueError, match="exceed"):
        wilson_interval(5, 4)


def test_wilson_refuses_fractional_trials():
    with pytest.raises(ValueError, match="whole number"):
        wilson_interval(1, 4.5)


def test_wilson_refuses_negative_successes():
    with pytest.raises(ValueError, match="non-negative"):
        wilson_interval(-1, 4)


def test_wilson_refuses_level_outside_0_1():
    with pytest.raises(ValueError, match="level"):
        wilson_interval(1, 4, level=95)


# -- exact binomial tails --------------------------------------------------------------------
@pytest.mark.parametrize("k, n, p", [(0, 10, 0.25), (7, 20, 0.25), (20, 20, 0.25), (13, 40, 0.5),
                                     (60, 200, 0.25), (900, 3000, 0.25), (3, 5, 0.0), (3, 5, 1.0)])
def test_binomial_tails_match_scipy_binomtest(k, n, p):
    # scipy.stats.binomtest one-sided p-values: "greater" is P(X >= k), "less" is P(X <= k).
    assert binomial_upper_tail(k, n, p) == pytest.approx(
        sps.binomtest(k, n, p, alternative="greater").pvalue, rel=1e-9, abs=1e-300)
    assert binomial_lower_tail(k, n, p) == pytest.approx(
        sps.binomtest(k, n, p, alternative="less").pvalue, rel=1e-9, abs=1e-300)


def test_binomial_upper_tail_hand_value():
    # P(X >= 2), X ~ Bin(3, 1/2) = (3 + 1) / 8 (common practice, no source).
    assert binomial_upper_tail(2, 3, 0.5) == pytest.approx(0.5, abs=1e-15)


def test_binomial_tail_refuses_probability_outside_0_1():
    with pytest.raises(ValueError, match="probability"):
        binomial_upper_tail(1, 3, 1.5)


def test_binomial_tail_refuses_k_above_n():
    with pytest.raises(ValueError, match="exceed"):
        binomial_lower_tail(4, 3, 0.5)


# -- bootstrap over days --------------------------------------------------------------------
def _trials(seed=1, n_days=12):
    rng = np.random.default_rng(seed)
    days = np.repeat([f"2026-10-{i + 1:02d}" for i in range(n_days)], rng.integers(3, 9, n_days))
    a = rng.normal(size=len(days))
    b = a - 0.3 + rng.normal(scale=0.5, size=len(days))
    return a, b, days


def _scipy_day_bootstrap(diff, days, seed, n_boot, level):
    # scipy.stats.bootstrap with paired=True resamples days (per-day sums and counts
    # together) and takes the ratio statistic; percentile method.
    _, inv = np.unique(days, return_inverse=True)
    sums = np.bincount(inv, weights=diff)
    counts = np.bincount(inv).astype(float)
    res = sps.bootstrap((sums, counts), lambda s, c, axis=-1: s.sum(axis=axis) / c.sum(axis=axis),
                        paired=True, vectorized=True, n_resamples=n_boot, confidence_level=level,
                        method="percentile", random_state=np.random.default_rng(seed))
    return res.confidence_interval


def test_paired_day_bootstrap_matches_scipy_bootstrap():
    # With the same generator scipy draws the same (n_resamples, n_days) index matrix,
    # so the intervals agree to rounding.
    a, b, days = _trials()
    got = paired_bootstrap_by_day(a, b, days, n_boot=4000, level=0.9, rng=np.random.default_rng(7))
    ref = _scipy_day_bootstrap(a - b, days, 7, 4000, 0.9)
    assert (got.low, got.high) == pytest.approx((ref.low, ref.high), rel=1e-12)
    assert got.estimate == pytest.approx(float(np.mean(a - b)), rel=1e-12)


def test_paired_day_bootstrap_agrees_with_scipy_for_other_seeds():
    # Independent seeds: the two Monte Carlo intervals agree to within their own noise.
    a, b, days = _trials(seed=3)
    got = paired_bootstrap_by_day(a, b, days, n_boot=20000, rng=11)
    ref = _scipy_day_bootstrap(a - b, days, 12, 20000, 0.95)
    width = ref.high - ref.low
    assert abs(got.low - ref.low) < 0.05 * width
    assert abs(got.high - ref.high) < 0.05 * width


def test_day_bootstrap_of_constant_values_is_degenerate():
    got = bootstrap_mean_by_day([2.0] * 6, ["a", "a", "b", "b", "c", "c"], n_boot=50)
    assert got == (2.0, 2.0, 2.0)


def test_day_bootstrap_empty_is_nan():
    assert all(math.isnan(v) for v in bootstrap_mean_by_day([], [], n_boot=10))


def test_paired_bootstrap_refuses_series_of_different_length():
    with pytest.raises(DataError, match="differ in length"):
        paired_bootstrap_by_day([1.0, 2.0], [1.0], ["a", "b"])


def test_day_bootstrap_refuses_missing_day_labels():
    with pytest.raises(DataError, match="one value per day label"):
        bootstrap_mean_by_day([1.0, 2.0], ["a"])


def test_day_bootstrap_refuses_zero_replicates():
    with pytest.raises(ValueError, match="n_boot"):
        bootstrap_mean_by_day([1.0], ["a"], n_boot=0)


# -- quantiles --------------------------------------------------------------------------------
@pytest.mark.parametrize("q", [0.0, 0.25, 0.5, 0.95, 1.0])
def test_quantile_type7_matches_numpy_default(q):
    # numpy.quantile's default method is Hyndman and Fan definition 7.
    xs = sorted(np.random.default_rng(0).exponential(3.0, 37).tolist())
    assert quantile_type7(xs, q) == pytest.approx(float(np.quantile(xs, q)), rel=1e-12)


def test_exposure_summary_keys_and_empty():
    assert exposure_summary([]) == {"n": 0, "median_s": None, "p95_s": None, "max_s": None}
    assert exposure_summary([4.0, None, 1.0]) == {"n": 2, "median_s": 2.5, "p95_s": pytest.approx(3.85),
                                                  "max_s": 4.0}
