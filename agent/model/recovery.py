"""Parameter recovery (Wilson and Collins 2019, "Ten simple rules for the
computational modeling of behavioral data", rule 6).

Draw parameters from a range, simulate the participant's choices on the real
trial design (cues and options kept, choices replaced), refit with the same
procedure as :func:`agent.model.fit.fit_model`, and correlate true with fitted
values across simulations, per parameter, on the log scale on which they are
fitted.  A parameter counts as identifiable when ``r >= 0.9``.

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
from .design import TrialDesign, as_model_graph
from .likelihood import ActivationCache, ModelSpec, model_log_probabilities

RANGES = {"theta": (np.log(0.3), np.log(3.0)), "beta": (np.log(0.1), np.log(3.0)),
          "tau": (np.log(0.2), np.log(2.0))}
IDENTIFIABLE_R = 0.9


def recover(graph, trials, n_sims: int = 30, seed: int = 0, *, restarts: int = 2,
            model: str = "full", spec: ModelSpec | None = None) -> dict:
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
        Restarts per refit (the true parameters are never used as a start).
    model : {"full", "beta_tau", "time_links"}
        Which parameterisation to simulate and refit: every θ, β and τ (what
        :func:`fit_model` fits); β and τ with every θ fixed at 1; or the
        time-links baseline.  ``spec`` overrides it.

    Returns
    -------
    dict
        ``{"params": {name: {"r", "identifiable", "true": [...], "fitted": [...]}},
        "n_sims", "n_trials", "threshold"}``; values are on the log scale.
    """
    if n_sims < 3:
        raise ValueError(f"n_sims = {n_sims}: expected at least 3 simulations for a correlation")
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):  # small eighs: threads only cost
        return _recover(graph, trials, n_sims, seed, restarts, model, spec)


def _recover(graph, trials, n_sims, seed, restarts, model, spec):
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
    true_p, fit_p = [], []
    cache = ActivationCache(mg, design)
    for i in range(n_sims):
        p = np.array([rng.uniform(*RANGES[k]) for k in keys])
        lp = model_log_probabilities(spec, cache, p)
        sim = design.with_choices(simulate_choices(lp, design.opt_mask, rng))
        model = EigenModel(spec, restarts=restarts, seed=seed + 1000 + i).fit(sim)
        true_p.append(p)
        fit_p.append(model.p)
    true_p, fit_p = np.array(true_p), np.array(fit_p)
    table = {}
    for j, name in enumerate(names):
        t, f = true_p[:, j], fit_p[:, j]
        r = float(np.corrcoef(t, f)[0, 1]) if t.std() > 0 and f.std() > 0 else float("nan")
        table[name] = {"r": r, "identifiable": bool(np.isfinite(r) and r >= IDENTIFIABLE_R),
                       "true": t.tolist(), "fitted": f.tolist()}
    return {"params": table, "model": spec.name, "n_sims": int(n_sims), "n_trials": len(design),
            "threshold": IDENTIFIABLE_R, "scale": "log"}


def recovery_text(rec: dict) -> str:
    lines = [f"parameter recovery ({rec.get('model', 'model')}): {rec['n_sims']} simulations x {rec['n_trials']} trials "
             f"(Pearson r of true vs fitted, log scale; identifiable at r >= {rec['threshold']})"]
    for name, row in rec["params"].items():
        mark = "identifiable" if row["identifiable"] else "not identifiable"
        lines.append(f"  {name:<24} r = {row['r']:6.3f}  {mark}")
    return "\n".join(lines)
