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

from typing import Any

import os

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
        "agreement": proportion(agree.sum(), n),
        "accuracy": proportion(acc.sum(), n),
        "loglik": {"value": float(ll.mean()) if n else float("nan"),
                   "ci": list(bootstrap_mean_by_day(ll, dates, n_boot=N_BOOT, rng=rng)[1:]) if n
                   else [float("nan")] * 2},
        "_per_trial": {"agree": agree, "acc": acc, "ll": ll, "dates": dates},
    }


def proportion(k, n) -> dict:
    """``{"value", "k", "ci"}``: the proportion k / n with its 95 % Wilson interval."""
    return {"value": float(k / n) if n else float("nan"), "k": float(k),
            "ci": list(wilson_interval(float(k), int(n)))}


def chance_metrics(design: TrialDesign, rows) -> dict:
    """Chance level of agreement and accuracy (mean of 1/options) and its log-likelihood."""
    m = design.opt_mask[rows].sum(axis=1)
    return {"agreement": float(np.mean(1.0 / m)), "loglik": float(np.mean(-np.log(m)))}


def _fit_job(pred, train: TrialDesign, test: TrialDesign | None, rng_key):
    """One fit (in a worker process or inline): the fitted predictor and its held-out log-probabilities."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        fit = pred.fit(train, rng=np.random.default_rng(rng_key))
        return fit, (fit.log_probabilities(test) if test is not None else None)


def default_jobs() -> int:
    """Worker processes: the cores this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def run_fits(jobs: list, n_jobs: int | None = None) -> list:
    """Run ``(predictor, train, test, rng_key)`` fits, in worker processes when ``n_jobs > 1``.

    Every job is seeded by its own key, so results do not depend on ``n_jobs``
    or on the order the workers finish.  Cheap predictors (no ``restarts``
    attribute) always run inline.
    """
    n_jobs = default_jobs() if n_jobs is None else int(n_jobs)
    results: list = [None] * len(jobs)
    heavy = [i for i, j in enumerate(jobs) if hasattr(j[0], "restarts")]
    light = [i for i in range(len(jobs)) if i not in set(heavy)]
    if n_jobs > 1 and len(heavy) > 1:
        import multiprocessing as mp
        from concurrent.futures import ProcessPoolExecutor

        ctx = mp.get_context("fork") if "fork" in mp.get_all_start_methods() else None
        with ProcessPoolExecutor(max_workers=min(n_jobs, len(heavy)), mp_context=ctx) as ex:
            # longest first: the model's fits before the rivals'
            futs = {i: ex.submit(_fit_job, *jobs[i]) for i in heavy}
            for i in light:
                results[i] = _fit_job(*jobs[i])
            for i, fut in futs.items():
                results[i] = fut.result()
    else:
        for i in range(len(jobs)):
            results[i] = _fit_job(*jobs[i])
    return results


def cross_validate(predictors: dict, design: TrialDesign, k: int, seed: int = 0, *,
                   n_jobs: int | None = 1, in_sample: bool = False, keep_fits: bool = False) -> dict:
    """Fit every predictor on k-1 folds and score it on the held-out fold.

    Returns ``{name: {"folds": [...], "pooled": {...}}}`` plus, under
    ``"_folds"``, the fold sizes, under ``"_lp"`` every predictor's pooled
    held-out log-probabilities and under ``"_rows"`` the held-out rows.  Pooled
    metrics are over all held-out predictions together.  With ``in_sample``
    each predictor is also fitted on every answered trial, returned under
    ``"_fitted"`` (name -> fitted predictor).  With ``keep_fits`` the fitted
    predictor of every fold is returned under ``"_fold_fits"`` (name -> list by
    fold), for :func:`score_fitted`.  Fits run in ``n_jobs`` worker processes
    (None: every usable core).
    """
    import copy

    folds = day_folds(design, k, seed)
    all_ans = np.flatnonzero(design.answered)
    jobs: list[tuple[Any, Any, Any, list[int]]] = []
    where: list[tuple[str, int | None]] = []
    for p_i, (name, pred) in enumerate(predictors.items()):
        if in_sample:
            jobs.append((copy.deepcopy(pred), design.subset(all_ans), None, [seed, 12345]))
            where.append((name, None))
        for f, test in enumerate(folds):
            train = np.setdiff1d(all_ans, test)
            jobs.append((copy.deepcopy(pred), design.subset(train), design.subset(test), [seed, f, p_i]))
            where.append((name, f))
    results = run_fits(jobs, n_jobs)
    out: dict = {}
    lps: dict[str, Any] = {}
    fitted: dict[str, Any] = {}
    fold_fits: dict[str, list] = {}
    for name in predictors:
        by_fold: dict[int, Any] = {}
        fits: list = [None] * len(folds)
        for (nm, fold), (fit, lp_test) in zip(where, results, strict=True):
            if nm != name:
                continue
            if fold is None:
                fitted[name] = fit
                continue
            by_fold[fold] = lp_test
            fits[fold] = fit
        out[name], lps[name] = _score(by_fold, folds, design, seed)
        fold_fits[name] = fits
    out["_folds"] = [len(f) for f in folds]
    out["_lp"] = lps
    out["_rows"] = np.concatenate(folds)
    if in_sample:
        out["_fitted"] = fitted
    if keep_fits:
        out["_fold_fits"] = fold_fits
    return out


def _score(lp_by_fold: dict, folds: list[np.ndarray], design: TrialDesign, seed: int):
    """Per-fold and pooled metrics from each fold's held-out log-probabilities."""
    pooled_lp = np.full(design.opt_mask.shape, -np.inf)
    per_fold = []
    for fold in sorted(lp_by_fold):
        test = folds[fold]
        pooled_lp[test] = lp_by_fold[fold]
        m = metrics(pooled_lp, design, np.random.default_rng([seed, fold, 7]), rows=test)
        m.pop("_per_trial")
        m["fold"] = fold
        m["days"] = sorted(set(design.dates[test].astype(str)))
        per_fold.append(m)
    rows = np.concatenate(folds)
    pooled = metrics(pooled_lp, design, np.random.default_rng([seed, 99]), rows=rows)
    pooled.pop("_per_trial")
    return {"folds": per_fold, "pooled": pooled}, pooled_lp


def score_fitted(fold_fits: list, design: TrialDesign, k: int, seed: int = 0) -> tuple[dict, np.ndarray]:
    """Held-out metrics of predictors already fitted on the folds of :func:`cross_validate`.

    ``fold_fits[f]`` must have been fitted on the training trials of fold ``f``
    of ``day_folds(design, k, seed)`` (for example a by-product of another
    predictor's fits, see ``EigenModel.nested``).  Returns the same
    ``{"folds", "pooled"}`` record as :func:`cross_validate` and the pooled
    held-out log-probabilities.
    """
    folds = day_folds(design, k, seed)
    if len(fold_fits) != len(folds):
        raise ValueError(f"score_fitted: expected {len(folds)} fitted predictors (one per fold), "
                         f"got {len(fold_fits)}")
    lp_by_fold = {f: fit.log_probabilities(design.subset(test))
                  for f, (fit, test) in enumerate(zip(fold_fits, folds, strict=True))}
    return _score(lp_by_fold, folds, design, seed)
