"""k-fold cross-validation by day, held-out metrics and their confidence intervals.

Folds hold whole days: all probes of one local date are in the same fold, so a
model is never scored on an hour whose neighbours on the same day it was fitted
on.  Days are dealt to folds greedily, largest day first, each to the fold with
the fewest answered trials so far (ties broken by a seeded shuffle), which keeps
fold sizes even.  With fewer days than folds there is one fold per day.

Metrics on held-out answered trials (skipped trials have no choice to predict):

agreement
    the model's argmax equals the participant's choice (ties share credit, see
    :func:`agent.model.choice.argmax_credit`); Wilson score interval.
accuracy
    the model's argmax equals the true place; Wilson score interval.
loglik
    mean log-probability of the participant's choice per trial; percentile
    bootstrap interval over days (days resampled with replacement).
"""

from __future__ import annotations

import numpy as np

from ..errors import DataError
from ..stats import bootstrap_mean_by_day, wilson_interval
from .choice import argmax_credit
from .design import TrialDesign

N_BOOT = 2000


def day_folds(design: TrialDesign, k: int, seed: int = 0) -> list[np.ndarray]:
    """Row indices of the answered trials in each held-out fold."""
    ans = np.flatnonzero(design.answered)
    dates = design.dates[ans].astype(str)
    uniq, counts = np.unique(dates, return_counts=True)
    if len(uniq) < 2:
        raise DataError(f"cross-validation needs answered trials on at least 2 days, got {len(uniq)}")
    k = min(int(k), len(uniq))
    rng = np.random.default_rng(seed)
    order = rng.permutation(len(uniq))
    order = order[np.argsort(-counts[order], kind="stable")]
    load = np.zeros(k)
    fold_of = {}
    for i in order:
        f = int(np.argmin(load))
        fold_of[uniq[i]] = f
        load[f] += counts[i]
    fid = np.array([fold_of[d] for d in dates], dtype=np.int64)
    return [ans[fid == f] for f in range(k)]


def metrics(logp, design: TrialDesign, rng, rows=None) -> dict:
    """Held-out metrics with intervals for ``rows`` (default: all answered trials)."""
    rows = np.flatnonzero(design.answered) if rows is None else np.asarray(rows)
    lp, mask = logp[rows], design.opt_mask[rows]
    choice, correct = design.choice_pos[rows], design.correct_pos[rows]
    n = len(rows)
    agree = argmax_credit(lp, mask, choice)
    acc = argmax_credit(lp, mask, correct)
    ll = lp[np.arange(n), choice] if n else np.zeros(0)
    dates = design.dates[rows].astype(str)
    return {
        "n": int(n),
        "n_days": int(len(np.unique(dates))),
        "agreement": _prop(agree.sum(), n),
        "accuracy": _prop(acc.sum(), n),
        "loglik": {"value": float(ll.mean()) if n else float("nan"),
                   "ci": list(bootstrap_mean_by_day(ll, dates, n_boot=N_BOOT, rng=rng)[1:]) if n
                   else [float("nan")] * 2},
        "_per_trial": {"agree": agree, "acc": acc, "ll": ll, "dates": dates},
    }


def _prop(k, n) -> dict:
    return {"value": float(k / n) if n else float("nan"), "k": float(k),
            "ci": list(wilson_interval(float(k), int(n)))}


def chance_metrics(design: TrialDesign, rows) -> dict:
    """Chance level of agreement and accuracy (mean of 1/options) and its log-likelihood."""
    m = design.opt_mask[rows].sum(axis=1)
    return {"agreement": float(np.mean(1.0 / m)), "loglik": float(np.mean(-np.log(m)))}


def cross_validate(predictors: dict, design: TrialDesign, k: int, seed: int = 0) -> dict:
    """Fit every predictor on k-1 folds and score it on the held-out fold.

    Returns ``{name: {"folds": [...], "pooled": {...}}}`` plus, under
    ``"_folds"``, the fold sizes.  Pooled metrics are over all held-out
    predictions together.
    """
    folds = day_folds(design, k, seed)
    all_ans = np.flatnonzero(design.answered)
    out = {}
    for name, pred in predictors.items():
        pooled_lp = np.full(design.opt_mask.shape, -np.inf)
        per_fold = []
        for f, test in enumerate(folds):
            train = np.setdiff1d(all_ans, test)
            fit = pred.fit(design.subset(train), rng=np.random.default_rng([seed, f, len(out)]))
            lp_test = fit.log_probabilities(design.subset(test))
            pooled_lp[test] = lp_test
            m = metrics(pooled_lp, design, np.random.default_rng([seed, f, 7]), rows=test)
            m.pop("_per_trial")
            m["fold"] = f
            m["days"] = sorted(set(design.dates[test].astype(str)))
            per_fold.append(m)
        rows = np.concatenate(folds)
        pooled = metrics(pooled_lp, design, np.random.default_rng([seed, 99]), rows=rows)
        pooled.pop("_per_trial")
        out[name] = {"folds": per_fold, "pooled": pooled}
    out["_folds"] = [len(f) for f in folds]
    return out
