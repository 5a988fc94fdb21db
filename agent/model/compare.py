"""Paired comparisons of the model with its rivals on the same held-out trials.

For every held-out answered trial each predictor gives a log-probability of the
participant's choice and an argmax credit for agreement (with the choice) and
accuracy (with the true place).  The model-minus-rival difference of each is
paired trial by trial and its interval comes from resampling whole days (the
same days for both predictors): :func:`agent.stats.paired_bootstrap_by_day`,
a percentile interval of the ratio estimator ``sum(diff) / count`` (checked
against :func:`scipy.stats.bootstrap` in the tests).

In-sample fits are compared by AIC = ``2k + 2 NLL`` (Akaike 1974) and BIC =
``k ln(n) + 2 NLL`` (Schwarz 1978), ``k`` free parameters, ``n`` answered trials.
"""

from __future__ import annotations

from typing import Any

import math

import numpy as np

from ..stats import paired_bootstrap_by_day
from .choice import argmax_credit
from .design import TrialDesign

METRICS = ("loglik", "agreement", "accuracy")


def per_trial(logp, design: TrialDesign, rows) -> dict:
    """Per-trial held-out scores of one predictor at ``rows`` (answered trials)."""
    rows = np.asarray(rows, dtype=np.int64)
    lp, mask = logp[rows], design.opt_mask[rows]
    choice, correct = design.choice_pos[rows], design.correct_pos[rows]
    return {"loglik": lp[np.arange(len(rows)), choice],
            "agreement": argmax_credit(lp, mask, choice),
            "accuracy": argmax_credit(lp, mask, correct)}


def paired_differences(logps: dict, design: TrialDesign, rows, *, reference: str = "model",
                       n_boot: int = 2000, seed: int = 0, level: float = 0.95) -> dict:
    """``reference`` minus every other predictor, per metric, with a day-bootstrap interval.

    Parameters
    ----------
    logps : dict
        Name -> (T, m) held-out log-probabilities (pooled over folds).
    design : TrialDesign
    rows : array of int
        The held-out answered trials (the same for every predictor).

    Returns
    -------
    dict
        ``{rival: {metric: {"value", "ci", "n", "n_days"}}}``; a positive value
        favours ``reference``.
    """
    rows = np.asarray(rows, dtype=np.int64)
    days = design.dates[rows].astype(str)
    ref = per_trial(logps[reference], design, rows)
    out: dict[str, Any] = {}
    for k, (name, lp) in enumerate(logps.items()):
        if name == reference:
            continue
        other = per_trial(lp, design, rows)
        out[name] = {}
        for j, metric in enumerate(METRICS):
            est = paired_bootstrap_by_day(ref[metric], other[metric], days, n_boot=n_boot, level=level,
                                          rng=np.random.default_rng([seed, k, j]))
            out[name][metric] = {"value": est.estimate, "ci": [est.low, est.high], "n": int(len(rows)),
                                 "n_days": int(len(np.unique(days)))}
    return out


def information_criteria(nll: float, n_params: int, n: int) -> dict:
    """AIC and BIC of an in-sample fit."""
    if n <= 0:
        raise ValueError(f"information criteria: expected at least one trial, got n = {n}")
    return {"nll": float(nll), "k": int(n_params), "aic": 2.0 * n_params + 2.0 * nll,
            "bic": n_params * math.log(n) + 2.0 * nll}
