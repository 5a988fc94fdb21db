"""``lethe study analyse``: the model against each rival across the cohort, on Dask.

For every participant (latest bundle; withdrawn participants left out) the
paired difference *model - rival* in held-out agreement and held-out
log-likelihood per trial is read from the bundle's cross-validation summary.
The group difference is the mean of those differences with a
participant-level bootstrap 95% interval (percentile method; Efron and
Tibshirani 1993, ch. 13), resamples spread over the Dask workers, and a
one-sample t-test as a cross-check.  Parameter distributions are summarised
by quantiles.  Bundles are streamed from the study folder or the server's
database one at a time; only a few numbers per participant are kept.
"""

from __future__ import annotations

import math
from collections import defaultdict
from collections.abc import Callable

import numpy as np

from .summary import summaries


def bootstrap_means(values: np.ndarray, n_boot: int, seed: int) -> np.ndarray:
    """Means of ``n_boot`` resamples (with replacement, same size) of ``values``; one Dask task."""
    rng = np.random.default_rng(seed)
    v = np.asarray(values, dtype=float)
    idx = rng.integers(0, len(v), size=(n_boot, len(v)))
    return v[idx].mean(axis=1)


def _collect(source) -> tuple[dict[str, list[float]], dict[str, list[float]], int]:
    diffs: dict[str, list[float]] = defaultdict(list)
    params: dict[str, list[float]] = defaultdict(list)
    n = 0
    for row in summaries(source):
        n += 1
        for k, v in row.items():
            if v is None or isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
                continue
            if k.startswith("diff:"):
                diffs[k[5:]].append(float(v))
            elif k.startswith("theta:") or k == "beta":
                params[k].append(float(v))
    return diffs, params, n


def analyse(source, *, scheduler: str | None = None, n_workers: int = 2, n_boot: int = 2000, seed: int = 0,
            chunk: int = 250, progress: Callable[[int, int], None] | None = None, client=None) -> dict:
    """Cohort results: per rival and metric the paired difference's mean, bootstrap CI, t-test; parameter quantiles.

    Parameters
    ----------
    source : path-like or CohortSource
        A study folder or the server's :class:`~agent.study.server.store.Store`.
    scheduler : str, optional
        ``tcp://HOST:8786``; default a LocalCluster of ``n_workers`` processes.
    n_boot : int
        Bootstrap resamples (split into tasks of ``chunk``).
    """
    from scipy import stats

    from .dask_util import dask_client, run_tasks
    from .source import as_source

    if not isinstance(n_boot, int) or n_boot < 100:
        raise ValueError(f"n_boot: expected an integer >= 100, got {n_boot!r}")
    src = as_source(source)
    diffs, params, n = _collect(src)
    out: dict = {"participants": n, "n_boot": n_boot, "seed": seed, "comparisons": {}, "parameters": {}}
    usable = {k: np.asarray(v) for k, v in sorted(diffs.items()) if len(v) >= 2}
    jobs = []
    for k, v in usable.items():
        for j, start in enumerate(range(0, n_boot, chunk)):
            jobs.append((k, (v, min(chunk, n_boot - start), seed * 1_000_003 + hash_key(k) * 1009 + j)))
    if jobs:
        with dask_client(scheduler, n_workers, client=client) as c:
            res = run_tasks(c, bootstrap_means, [a for _, a in jobs], progress)
        boots: dict[str, list[np.ndarray]] = defaultdict(list)
        for (k, _), r in zip(jobs, res, strict=True):
            boots[k].append(r)
    for k, v in usable.items():
        rival, metric = k.rsplit(":", 1)
        b = np.concatenate(boots[k])
        t = stats.ttest_1samp(v, 0.0) if np.ptp(v) > 0 else None  # no spread: no t statistic
        out["comparisons"].setdefault(rival, {})[metric] = {
            "n": int(len(v)), "mean": float(v.mean()), "median": float(np.median(v)),
            "ci95": [float(np.percentile(b, 2.5)), float(np.percentile(b, 97.5))],
            "t": float(t.statistic) if t else None, "p_value": float(t.pvalue) if t else None,
            "share_model_better": float(np.mean(v > 0)),
        }
    for k, vals in sorted(params.items()):
        a = np.asarray(vals)
        q = np.percentile(a, [5, 25, 50, 75, 95])
        out["parameters"][k] = {"n": int(len(a)), "mean": float(a.mean()), "sd": float(a.std(ddof=1)) if len(a) > 1
                                else None, **{f"q{p:02d}": float(x) for p, x in zip((5, 25, 50, 75, 95), q,
                                                                                     strict=True)}}
    return out


def hash_key(k: str) -> int:
    """A stable small integer for a key (Python's hash() is salted per process)."""
    import zlib

    return zlib.crc32(k.encode()) % 100_003


def analyse_text(res: dict) -> str:
    lines = [f"{res['participants']} participant(s) (latest bundle each; withdrawn left out), "
             f"{res['n_boot']} bootstrap resamples"]
    for rival, ms in res["comparisons"].items():
        for metric, s in ms.items():
            lines.append(f"  model - {rival}, held-out {metric}: mean {s['mean']:+.4f} "
                         f"[{s['ci95'][0]:+.4f}, {s['ci95'][1]:+.4f}] (n = {s['n']}, t-test p = "
                         + (f"{s['p_value']:.3g}" if s["p_value"] is not None else "-") + ", "
                         f"model better for {100 * s['share_model_better']:.0f}%)")
    for k, s in res["parameters"].items():
        lines.append(f"  {k}: median {s['q50']:.3g} (5-95%: {s['q05']:.3g} to {s['q95']:.3g}; n = {s['n']})")
    return "\n".join(lines)
