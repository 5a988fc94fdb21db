"""Small statistics shared by the model, the quiz, the audit and the study side.

One implementation each of: the Wilson score interval for a proportion, the
exact binomial tail (pure :mod:`math`, no scipy at run time), the percentile
bootstrap with whole days resampled (one series, or two paired series), and
order-statistic quantiles for exposure summaries.

References
----------
Wilson, E. B. (1927). Probable inference, the law of succession, and
statistical inference.  J. Am. Stat. Assoc. 22, 209-212.
Newcombe, R. G. (1998). Two-sided confidence intervals for the single
proportion: comparison of seven methods.  Stat. Med. 17, 857-872.
Efron, B. and Tibshirani, R. (1993). An Introduction to the Bootstrap, ch. 13
(percentile intervals).
Hyndman, R. J. and Fan, Y. (1996). Sample quantiles in statistical packages.
Am. Stat. 50, 361-365 (definition 7).
"""

from __future__ import annotations

import math
import numbers
from statistics import NormalDist
from typing import TYPE_CHECKING, NamedTuple

from .errors import DataError

if TYPE_CHECKING:  # numpy is imported where it is used: `lethe status` needs only math here
    import numpy as np

__all__ = ["BootstrapInterval", "binomial_lower_tail", "binomial_upper_tail", "bootstrap_mean_by_day",
           "exposure_summary", "paired_bootstrap_by_day", "quantile_type7", "wilson_interval"]


def _z(level: float) -> float:
    if not (isinstance(level, (int, float)) and 0.0 < float(level) < 1.0):
        raise ValueError(f"level must be a number strictly between 0 and 1, got {level!r}")
    return NormalDist().inv_cdf(0.5 + float(level) / 2.0)


def _count(name: str, value) -> int:
    if isinstance(value, bool) or not float(value).is_integer() or value < 0:
        raise ValueError(f"{name} must be a non-negative whole number, got {value!r}")
    return int(value)


# -- proportions -------------------------------------------------------------------------
def wilson_interval(successes, n, *, level: float = 0.95) -> tuple[float, float]:
    """Wilson score interval for a binomial proportion ``successes / n``.

    Parameters
    ----------
    successes : float
        Number of successes, ``0 <= successes <= n``; may be fractional (a
        trial whose answer ties between options earns partial credit).
    n : int
        Number of trials; ``n = 0`` gives ``(nan, nan)``.
    level : float
        Two-sided confidence level, strictly between 0 and 1.

    Returns
    -------
    (low, high) : tuple of float
        Bounds within [0, 1].
    """
    n = _count("n", n)
    if isinstance(successes, bool) or not (isinstance(successes, numbers.Real) and float(successes) >= 0.0):
        raise ValueError(f"successes must be a non-negative number, got {successes!r}")
    k = float(successes)
    if k > n:
        raise ValueError(f"successes must not exceed n, got {k} > {n}")
    z = _z(level)
    if n == 0:
        return (float("nan"), float("nan"))
    p = k / n
    z2 = z * z
    denom = 1.0 + z2 / n
    centre = (p + z2 / (2 * n)) / denom
    half = z / denom * math.sqrt(p * (1 - p) / n + z2 / (4 * n * n))
    return (max(0.0, centre - half), min(1.0, centre + half))


def _log_pmf(i: int, n: int, p: float) -> float:
    if p == 0.0:
        return 0.0 if i == 0 else -math.inf
    if p == 1.0:
        return 0.0 if i == n else -math.inf
    return (math.lgamma(n + 1) - math.lgamma(i + 1) - math.lgamma(n - i + 1)
            + i * math.log(p) + (n - i) * math.log1p(-p))


def _tail(lo: int, hi: int, n: int, p: float) -> float:
    """Sum of the binomial pmf over ``lo..hi`` (inclusive), in log space for large n."""
    if lo > hi:
        return 0.0
    logs = [_log_pmf(i, n, p) for i in range(lo, hi + 1)]
    top = max(logs)
    if top == -math.inf:
        return 0.0
    return min(1.0, math.exp(top) * math.fsum(math.exp(v - top) for v in logs))


def _binom_args(k, n, p) -> tuple[int, int, float]:
    k, n = _count("k", k), _count("n", n)
    if k > n:
        raise ValueError(f"k must not exceed n, got {k} > {n}")
    if not (isinstance(p, (int, float)) and not isinstance(p, bool) and 0.0 <= float(p) <= 1.0):
        raise ValueError(f"p must be a probability in [0, 1], got {p!r}")
    return k, n, float(p)


def binomial_upper_tail(k, n, p) -> float:
    """Exact ``P(X >= k)`` for ``X ~ Binomial(n, p)``: the one-sided p-value for "better than ``p``"."""
    k, n, p = _binom_args(k, n, p)
    return 1.0 if k == 0 else _tail(k, n, n, p)


def binomial_lower_tail(k, n, p) -> float:
    """Exact ``P(X <= k)`` for ``X ~ Binomial(n, p)``: the one-sided p-value for "worse than ``p``"."""
    k, n, p = _binom_args(k, n, p)
    return 1.0 if k == n else _tail(0, k, n, p)


# -- bootstrap over days -------------------------------------------------------------------
class BootstrapInterval(NamedTuple):
    """A point estimate and its percentile bootstrap interval."""

    estimate: float
    low: float
    high: float


def _by_day(values, days) -> tuple[np.ndarray, np.ndarray]:
    import numpy as np

    values = np.asarray(values, dtype=np.float64)
    days = np.asarray(days, dtype=str)
    if values.ndim != 1 or days.shape != values.shape:
        raise DataError(f"bootstrap: expected one value per day label, got {values.shape} values "
                        f"and {days.shape} day labels")
    _, inv = np.unique(days, return_inverse=True)
    g = int(inv.max()) + 1 if inv.size else 0
    return (np.bincount(inv, weights=values, minlength=g), np.bincount(inv, minlength=g).astype(np.float64))


def bootstrap_mean_by_day(values, days, *, n_boot: int = 2000, level: float = 0.95,
                          rng: np.random.Generator | int | None = 0) -> BootstrapInterval:
    """Mean of ``values`` with a percentile interval from resampling whole days.

    Trials of one day are not independent (same places, same mood), so days are
    the resampling unit: each replicate draws as many days as there are, with
    replacement, and takes ``sum(values) / count`` over the trials of the drawn
    days (a ratio estimator).

    Parameters
    ----------
    values : array_like of float
        One value per trial.
    days : array_like of str
        The day (local date) of each trial.
    n_boot : int
        Number of bootstrap replicates.
    level : float
        Two-sided level of the percentile interval.
    rng : numpy.random.Generator, int or None
        Random generator or seed.

    Returns
    -------
    BootstrapInterval
        ``(estimate, low, high)``; all nan when there are no values.
    """
    if not (isinstance(n_boot, int) and n_boot >= 1):
        raise ValueError(f"n_boot must be a positive integer, got {n_boot!r}")
    _z(level)
    sums, counts = _by_day(values, days)
    g = len(sums)
    if g == 0:
        nan = float("nan")
        return BootstrapInterval(nan, nan, nan)
    import numpy as np

    rng = np.random.default_rng(rng)
    draws = rng.integers(0, g, size=(n_boot, g))
    stat = sums[draws].sum(axis=1) / counts[draws].sum(axis=1)
    a = (1.0 - level) / 2.0
    est = float(sums.sum() / counts.sum())
    return BootstrapInterval(est, float(np.quantile(stat, a)), float(np.quantile(stat, 1.0 - a)))


def paired_bootstrap_by_day(a, b, days, *, n_boot: int = 2000, level: float = 0.95,
                            rng: np.random.Generator | int | None = 0) -> BootstrapInterval:
    """Mean paired difference ``a - b`` with days resampled (the same days for both series).

    ``a`` and ``b`` are two scores of the same trials (say two models'
    log-probabilities of each answer); pairing keeps each trial's two scores
    together, so the interval reflects the difference, not each score's spread.
    Parameters as in :func:`bootstrap_mean_by_day`.
    """
    import numpy as np

    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    if a.shape != b.shape:
        raise DataError(f"paired bootstrap: the two series differ in length ({a.shape} and {b.shape})")
    return bootstrap_mean_by_day(a - b, days, n_boot=n_boot, level=level, rng=rng)


# -- quantiles ---------------------------------------------------------------------------
def quantile_type7(sorted_values, q: float) -> float:
    """Linear interpolation between order statistics (Hyndman and Fan definition 7, numpy's default)."""
    n = len(sorted_values)
    if n == 0:
        raise ValueError("quantile of an empty sample")
    if not 0.0 <= q <= 1.0:
        raise ValueError(f"q must be in [0, 1], got {q!r}")
    h = (n - 1) * q
    lo = math.floor(h)
    hi = min(lo + 1, n - 1)
    return float(sorted_values[lo] + (h - lo) * (sorted_values[hi] - sorted_values[lo]))


def exposure_summary(exposures_s) -> dict:
    """``{"n", "median_s", "p95_s", "max_s"}`` of raw-data exposure times in seconds (None when empty)."""
    xs = sorted(float(x) for x in exposures_s if x is not None)
    if not xs:
        return {"n": 0, "median_s": None, "p95_s": None, "max_s": None}
    return {"n": len(xs), "median_s": quantile_type7(xs, 0.5), "p95_s": quantile_type7(xs, 0.95),
            "max_s": xs[-1]}
