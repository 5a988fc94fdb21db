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
