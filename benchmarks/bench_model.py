"""Benchmark of the memory model: per-trial solver times and full cross-validated fits.

Run: ``/work/venv/bin/python benchmarks/bench_model.py [--quick]``.

Part 1 times one batch of 200 trials (3-node cues, 4 options) on random sparse
graphs with n = 100, 300, 1000 nodes (mean degree about 5, like the capped
graph), for the fast secular solver (one eigh of W for the batch, then all
trials vectorised; the eigh is included, amortised over the batch) and for the
per-trial reference solvers: dense scipy.linalg.eigh of M, shifted power
iteration and scipy.sparse.linalg.eigsh (single runs from the cue, i.e.
``canonical=False``).  Slow references are timed on a subset of the trials and
reported per trial; ratios come from the same run.  Every solver's activations
are checked against the dense one.

Part 2 times ``fit_model`` (5 folds, 4 restarts, model and all baselines) on a
synthetic 14-day demo participant and a synthetic 3-month participant.

BLAS runs single-threaded (threadpoolctl): at these sizes thread start-up costs
more than it saves, and the figures do not depend on other load on the machine
as much.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from threadpoolctl import threadpool_limits

from agent.model.retrieval import dense_activation, eigsh_activation, power_activation
from agent.model.secular import RankOneSolver


def random_sparse_graph(n, mean_degree, rng):
    p = mean_degree / (n - 1)
    a = np.triu((rng.random((n, n)) < p).astype(float), 1)
    a *= rng.uniform(0.5, 2.0, size=(n, n))
    return a + a.T


def per_trial(n, n_trials, rng, subset):
    w = random_sparse_graph(n, 5.0, rng)
    cue_idx = np.array([rng.choice(n, 3, replace=False) for _ in range(n_trials)])
    cue_w = np.full((n_trials, 3), 1 / np.sqrt(3))
    rows = np.array([rng.choice(n, 4, replace=False) for _ in range(n_trials)])
    beta = 2.0

    t = time.perf_counter()
    solver = RankOneSolver(w)
    t_eigh = time.perf_counter() - t
    t = time.perf_counter()
    fast = solver.solve(cue_idx, cue_w, beta, rows)
    t_solve = time.perf_counter() - t
    fast_per = (t_eigh + t_solve) / n_trials

    def x_of(i):
        x = np.zeros(n)
        x[cue_idx[i]] = cue_w[i]
        return x

    k = min(subset, n_trials)
    out = {"n": n, "trials": n_trials, "fast_per_trial_s": fast_per, "fast_eigh_s": t_eigh,
           "fast_solve_per_trial_s": t_solve / n_trials}
    err = 0.0
    for name, fn in (("dense", lambda x: dense_activation(w, x, beta)[0]),
                     ("power", lambda x: power_activation(w, x, beta, canonical=False).v),
                     ("eigsh", lambda x: eigsh_activation(w, x, beta, canonical=False)[0])):
        t = time.perf_counter()
        vs = [fn(x_of(i)) for i in range(k)]
        dt = (time.perf_counter() - t) / k
        out[f"{name}_per_trial_s"] = dt
        out[f"{name}_over_fast"] = dt / fast_per
        for i, v in enumerate(vs):
            err = max(err, float(np.abs(v[rows[i]] - fast[i]).max()))
    out["max_abs_diff"] = err
    return out


def fit_time(days, n_trials, seed=0, cap_rule=None):
    from agent.graph import CooccurrenceGraph
    from agent.model.design import ModelGraph
    from agent.model.fit import fit_model
    from agent.model.synthetic import quiz_trials, routine_episodes, simulate_answers

    eps = routine_episodes(days, seed=seed)
    g = CooccurrenceGraph.from_episodes(eps, None, cap_rule=cap_rule)
    mg = ModelGraph.from_graph(g)
    trials = quiz_trials(eps, n_trials, seed=seed + 1)
    rows = simulate_answers(mg, trials, mg.theta_dict(np.ones(len(mg.type_pairs))), 2.0, 0.2, seed=seed + 2)
    t = time.perf_counter()
    res = fit_model(g, rows, None, seed=0, episodes=eps, folds=5, restarts=4)
    dt = time.perf_counter() - t
    d = res.to_dict()
    return {"days": days, "trials": n_trials, "cap_rule": cap_rule, "nodes": mg.n,
            "type_pairs": len(mg.type_pairs), "seconds": dt,
            "agreement": d["cv"]["pooled"]["agreement"]["value"],
            "agreement_ci": d["cv"]["pooled"]["agreement"]["ci"]}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="smaller subsets for the slow references")
    args = ap.parse_args(argv)
    rng = np.random.default_rng(0)
    with threadpool_limits(limits=1, user_api="blas"):
        print("per-trial solver time (200 trials, beta = 2, 3-node cue, 4 options)")
        print(f"{'n':>5} {'fast ms':>9} {'dense ms':>9} {'power ms':>9} {'eigsh ms':>9} "
              f"{'dense/fast':>11} {'power/fast':>11} {'eigsh/fast':>11} {'max diff':>9}")
        subsets = {100: 200, 300: 60, 1000: 10} if not args.quick else {100: 40, 300: 10, 1000: 3}
        for n in (100, 300, 1000):
            r = per_trial(n, 200, rng, subsets[n])
            print(f"{n:>5} {1e3 * r['fast_per_trial_s']:>9.3f} {1e3 * r['dense_per_trial_s']:>9.3f} "
                  f"{1e3 * r['power_per_trial_s']:>9.3f} {1e3 * r['eigsh_per_trial_s']:>9.3f} "
                  f"{r['dense_over_fast']:>11.1f} {r['power_over_fast']:>11.1f} {r['eigsh_over_fast']:>11.1f} "
                  f"{r['max_abs_diff']:>9.1e}")
        print()
        print("full 5-fold fit (4 restarts; model + chance, frequency, centrality, time-links)")
        for days, n_trials, rule in ((14, 100, "arrival"), (14, 100, "strongest"), (91, 300, "arrival"),
                                     (91, 300, "strongest")):
            r = fit_time(days, n_trials, cap_rule=rule)
            lo, hi = r["agreement_ci"]
            print(f"  {days:>3} days, {n_trials} trials, cap {rule:<9}: {r['nodes']} nodes, "
                  f"{r['type_pairs']} type pairs, {r['seconds']:.1f} s; held-out agreement "
                  f"{r['agreement']:.3f} [{lo:.2f}, {hi:.2f}]")


if __name__ == "__main__":
    main()
