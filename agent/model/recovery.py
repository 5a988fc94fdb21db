"""Parameter recovery (Wilson and Collins 2019, "Ten simple rules for the
computational modeling of behavioral data", rule 6).

Draw parameters, simulate the participant's choices on the real trial design
(cues and options kept, choices replaced), refit with the same procedure as
:func:`agent.model.fit.fit_model`, and compare true with fitted values across
simulations, per parameter, on the log scale on which they are fitted: Pearson
``r``, bias (mean fitted minus true) and RMSE.  A parameter counts as
identifiable when ``r >= 0.7`` (issue 11; Wilson and Collins ask for a high
correlation without fixing a number).

True parameters are drawn log-uniformly from :data:`RANGES`, or, on the device
after a fit (``around=`` the fitted packed parameters), within a factor
``AROUND_FACTOR`` of the fitted value on either side: the question there is
whether *this* participant's design (trial count, options, graph) could tell
values near the fitted ones apart.  Refits run in worker processes.

Why some parameters are not identifiable: a type-pair weight θ changes the
option activations only through walks that reach places; pairs far from the
places (mood-mood, mood-sound, ...) or with few edges after the degree cap move
them little, and different θ can produce nearly the same option activations
(trade-offs), so the choices carry little information about them.  β and τ act
on every trial and are usually the best recovered.
"""

from __future__ import annotations

import numpy as np

from .baselines import EigenModel
from .choice import simulate_choices
from .crossval import run_fits
from .design import TrialDesign, as_model_graph
from .likelihood import ActivationCache, ModelSpec, model_log_probabilities

RANGES = {"theta": (np.log(0.3), np.log(3.0)), "beta": (np.log(0.1), np.log(3.0)),
          "tau": (np.log(0.2), np.log(2.0))}
IDENTIFIABLE_R = 0.7
AROUND_FACTOR = 3.0


def recover(graph, trials, n_sims: int = 30, seed: int = 0, *, restarts: int = 1,
            model: str = "full", spec: ModelSpec | None = None, around=None,
            n_jobs: int | None = None, reuse: dict | None = None) -> dict:
    """Simulate-and-refit recovery table.

    Parameters
    ----------
    graph : CooccurrenceGraph or ModelGraph
    trials : sequence of dict
        The trial design (cues and options); any choices are ignored.
    n_sims : int
        Simulated participants (at least 3 for a correlation).
    seed : int
    restarts : int
        Random restarts per refit (the true parameters are never used as a start).
    model : {"full", "beta_tau", "time_links"}
        Which parameterisation to simulate and refit: what :func:`fit_model`
        fits (grouped weights, β, τ); β and τ with every θ fixed at 1; or the
        time-links rival.  ``spec`` overrides it.
    around : array, optional
        Packed parameters to draw the true values around (see the module docstring).
    n_jobs : int, optional
        Worker processes (default: every usable core).
    reuse : dict, optional
        An earlier result of this function with the same graph, trials, seed,
        spec and ``around`` but fewer simulations: its refits are kept and only
        the further simulations are run.  Simulation ``i`` draws its parameters
        and choices from one seeded stream in order and is refitted with seed
        ``seed + 1000 + i``, so the result equals a fresh run with ``n_sims``
        (tested).  The fit uses it to extend a screening recovery.

    Returns
    -------
    dict
        ``{"params": {name: {"r", "bias", "rmse", "identifiable", "true": [...],
        "fitted": [...]}}, "n_sims", "n_trials", "threshold", "scale": "log"}``.
    """
    if n_sims < 3:
        raise ValueError(f"n_sims = {n_sims}: expected at least 3 simulations for a correlation")
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):  # small eighs: threads only cost
        return _recover(graph, trials, n_sims, seed, restarts, model, spec, around, n_jobs, reuse)


def _recover(graph, trials, n_sims, seed, restarts, model, spec, around, n_jobs, reuse=None):
    mg = as_model_graph(graph)
    if spec is None:
        specs = {"full": lambda: ModelSpec.full(mg),
                 "beta_tau": lambda: ModelSpec(mg, reference=None, fit_theta=False, name="beta_tau"),
                 "time_links": lambda: ModelSpec.time_links(mg)}
        if model not in specs:
            raise ValueError(f"model = {model!r}: expected one of {sorted(specs)}")
        spec = specs[model]()
    design = TrialDesign(mg, [dict(t, choice=None) for t in trials])
    rng = np.random.default_rng(seed)
    keys = spec._keys()
    names = spec.names()
    bounds = np.array(spec.bounds())
    if around is not None:
        around = np.asarray(around, dtype=np.float64)
        if around.shape != (len(keys),):
            raise ValueError(f"around: expected {len(keys)} packed parameters, got shape {around.shape}")
        half = np.log(AROUND_FACTOR)
        lo = np.clip(around - half, bounds[:, 0], bounds[:, 1])
        hi = np.clip(around + half, bounds[:, 0], bounds[:, 1])
    else:
        lo = np.array([RANGES[k][0] for k in keys])
        hi = np.array([RANGES[k][1] for k in keys])
    cache = ActivationCache(mg, design)
    done = _reusable(reuse, names, n_sims)
    true_p, jobs = [], []
    for i in range(n_sims):
        p = rng.uniform(lo, hi)
        lp = model_log_probabilities(spec, cache, p)
        sim = design.with_choices(simulate_choices(lp, design.opt_mask, rng))
        true_p.append(p)
        if i >= len(done):
            jobs.append((EigenModel(spec, restarts=restarts, seed=seed + 1000 + i), sim, None,
                         [seed, 1000 + i]))
    true_arr = np.array(true_p)
    if len(done) and not np.allclose(true_arr[: len(done)], done[:, 0, :], rtol=0, atol=1e-12):
        raise ValueError("reuse: the earlier recovery drew other parameters (another graph, trials, "
                         "seed, spec or around); expected the same set-up with fewer simulations")
    fresh = [fit.p for fit, _ in run_fits(jobs, n_jobs)]
    fit_arr = np.array(([*done[:, 1, :]] if len(done) else []) + fresh)
    table = {}
    for j, name in enumerate(names):
        t, f = true_arr[:, j], fit_arr[:, j]
        r = float(np.corrcoef(t, f)[0, 1]) if t.std() > 0 and f.std() > 0 else float("nan")
        table[name] = {"r": r, "bias": float(np.mean(f - t)), "rmse": float(np.sqrt(np.mean((f - t) ** 2))),
                       "identifiable": bool(np.isfinite(r) and r >= IDENTIFIABLE_R),
                       "true": t.tolist(), "fitted": f.tolist()}
    return {"params": table, "model": spec.name, "n_sims": int(n_sims), "n_trials": len(design),
            "threshold": IDENTIFIABLE_R, "scale": "log",
            "draws": "around the fit" if around is not None else "ranges"}


def _reusable(reuse, names, n_sims) -> np.ndarray:
    """``(k, 2, n_params)``: true and fitted values of an earlier run's first k <= n_sims simulations."""
    if reuse is None:
        return np.zeros((0, 2, len(names)))
    rows = reuse.get("params") or {}
    if list(rows) != list(names) or any("true" not in rows[n] for n in names):
        raise ValueError(f"reuse: expected a full recovery result (with per-simulation values) for "
                         f"parameters {names}, got {list(rows)}")
    k = min(int(reuse["n_sims"]), int(n_sims))
    t = np.array([rows[n]["true"][:k] for n in names]).T
    f = np.array([rows[n]["fitted"][:k] for n in names]).T
    return np.stack([t, f], axis=1)


def recovery_summary(rec: dict) -> dict:
    """The recovery table without the per-simulation lists (for the fit record and the bundle)."""
    out = {k: v for k, v in rec.items() if k != "params"}
    out["params"] = {n: {k: row[k] for k in ("r", "bias", "rmse", "identifiable")}
                     for n, row in rec["params"].items()}
    return out


def recovery_text(rec: dict) -> str:
    lines = [f"parameter recovery ({rec.get('model', 'model')}): {rec['n_sims']} simulations x "
             f"{rec['n_trials']} trials (log scale; identifiable at r >= {rec['threshold']})"]
    for name, row in rec["params"].items():
        mark = "identifiable" if row["identifiable"] else "not identifiable"
        lines.append(f"  {name:<24} r = {row['r']:6.3f}  bias {row['bias']:+.3f}  RMSE {row['rmse']:.3f}  {mark}")
    return "\n".join(lines)
