"""Choice rule: softmax (Luce) over the options' activations.

Activations enter the rule as ``a = sqrt(n) * v`` with ``v`` the unit-norm
canonical eigenvector and ``n`` the number of graph nodes, so a uniform
activation has components 1 whatever the graph size.  Unit norm pins the scale
of ``v`` (the eigenvector is otherwise defined only up to a factor), which is
what makes the temperature ``tau`` identifiable: ``p_k = exp(a_k / tau) / sum_j
exp(a_j / tau)`` over the trial's options.  Rescaling by the maximum component
instead would need the whole vector per trial (the fast solver only computes
the option rows) and would tie ``tau`` to whichever node happens to be largest.
"""

from __future__ import annotations

import numpy as np

# activations closer than this count as a tie for the argmax metrics
TIE_ATOL = 1e-12
# ratio scores: an option with no activation keeps this share of the options' mean
RATIO_EPS = 1e-3
_TINY = 1e-300  # all options at zero activation: equal scores (uniform choice)


def ratio_scores(act, mask):
    """Scale-free option scores ``s_k = ln(a_k + eps * mean_j a_j)`` over the trial's options.

    Adding a constant to every score of a trial does not change a softmax, so
    ``s`` depends on the activation only through the *ratios* ``a_k / mean_j
    a_j``: multiplying the activation vector by any factor (the norm of the
    eigenvector, ``sqrt(n)``, the size of W) leaves the choice probabilities
    unchanged, and the Luce rule becomes ``p_k ∝ (a_k + eps mean)^(1/tau)``.
    Negative components (rounding) are clipped at 0.

    Returns
    -------
    score, den, mean : ndarrays
        ``score`` (0 outside ``mask``), ``den = a_k + eps * mean`` and the
        options' mean activation (for the gradient).
    """
    mask = np.asarray(mask, dtype=bool)
    a = np.where(mask, np.maximum(np.asarray(act, dtype=np.float64), 0.0), 0.0)
    m = np.maximum(mask.sum(axis=1, keepdims=True), 1)
    mean = a.sum(axis=1, keepdims=True) / m
    den = a + RATIO_EPS * mean + _TINY
    return np.where(mask, np.log(den), 0.0), den, mean


def log_probabilities(scores, mask, tau: float) -> np.ndarray:
    """Log softmax of ``scores / tau`` over the options marked in ``mask`` (-inf elsewhere)."""
    tau = float(tau)
    if not np.isfinite(tau) or tau <= 0:
        raise ValueError(f"tau = {tau!r}: expected a finite number > 0")
    z = np.where(mask, np.asarray(scores, dtype=np.float64) / tau, -np.inf)
    zmax = z.max(axis=1, keepdims=True)
    lse = zmax + np.log(np.exp(z - zmax).sum(axis=1, keepdims=True))
    return np.where(mask, z - lse, -np.inf)


def uniform_log_probabilities(mask) -> np.ndarray:
    k = mask.sum(axis=1, keepdims=True)
    return np.where(mask, -np.log(k), -np.inf)


def argmax_credit(logp, mask, pos) -> np.ndarray:
    """Credit for picking ``pos`` by the argmax rule: 1/(number tied at the max) if ``pos`` is among them.

    This is the expected hit rate when ties are broken at random, so a model that
    cannot tell the options apart scores chance, not 0 or 1.
    """
    lp = np.where(mask, logp, -np.inf)
    best = lp.max(axis=1, keepdims=True)
    tied = mask & (lp >= best - TIE_ATOL)
    n_tied = tied.sum(axis=1)
    hit = tied[np.arange(len(pos)), np.clip(pos, 0, None)] & (pos >= 0)
    return np.where(hit, 1.0 / np.maximum(n_tied, 1), 0.0)


def simulate_choices(logp, mask, rng) -> np.ndarray:
    """Draw one option position per trial from the probabilities ``exp(logp)``."""
    p = np.where(mask, np.exp(logp), 0.0)
    p = p / p.sum(axis=1, keepdims=True)
    u = rng.random(len(p))[:, None]
    return np.minimum((np.cumsum(p, axis=1) < u).sum(axis=1), mask.sum(axis=1) - 1)
