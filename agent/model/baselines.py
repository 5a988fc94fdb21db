"""The model and its baselines as predictors with one interface.

A predictor is fitted on training trials (``fit(design)``) and then gives
log-probabilities over the options of any trials (``log_probabilities(design)``).
Cross-validation treats all of them alike, on the same folds.

``EigenModel``
    the cue-biased eigenvector model (θ, β, τ by maximum likelihood).
``Chance``
    ``1 / options``; nothing to fit.
``Frequency``
    the option most often visited at the probed hour and weekday.  Scores are
    ``s = n(hour, weekday, place) + 1e-3 n(hour, place) + 1e-6 n(place)`` from
    the episodes (the small terms only break ties, in that order); without
    episodes the graph's uncapped co-occurrence counts give
    ``s = c(hour, place) + c(weekday, place)``.  Choice is a Luce rule on the
    add-one-smoothed scores, ``p ∝ (1 + s)^(1/τ)``, with τ fitted.
``Centrality``
    β = 0 and every θ = 1: plain eigenvector centrality of the capped graph,
    the same for every cue; τ fitted.
``TimeLinks``
    the model with every type pair other than time-place (hour, weekday and
    week to place) fixed at 0; θ of those pairs, β and τ fitted.

The episodes, and therefore the counts and the graph, include the probed hours
themselves: the model and the frequency baseline see the same history, which is
the design of the study (the graph is the participant's record), not a fold leak.
"""

from __future__ import annotations

from typing import Any

from collections import Counter

import numpy as np
from scipy.optimize import minimize, minimize_scalar

from ..errors import StateError

from .choice import log_probabilities, ratio_scores, uniform_log_probabilities
from .design import PLACE, ModelGraph, TrialDesign
from .likelihood import (LOG_TAU_BOUNDS, ActivationCache, ModelSpec, model_log_probabilities,
                         negative_log_likelihood, nll_and_grad)


# relative change of the objective at which L-BFGS-B stops; 1e-7 of an NLL near
# 50 is 5e-6 nats, far below anything the held-out metrics can resolve
FTOL = 1e-7
GTOL = 1e-3  # largest projected gradient component, in nats per log-unit
SCREEN = 8  # random draws screened per restart
# line-search steps per iteration (default 20): at a jump of the piecewise-smooth
# objective extra steps only spend evaluations without getting past it
MAXLS = 10
# log β of the start taken from the nested β = 0 fit (β relative to λ1)
LOG_BETA_NESTED_START = np.log(0.05)


class Chance:
    name = "chance"
    n_params = 0

    def fit(self, design: TrialDesign, rng=None):
        return self

    def log_probabilities(self, design: TrialDesign) -> np.ndarray:
        return uniform_log_probabilities(design.opt_mask)

    def params(self) -> dict:
        return {}


def fit_tau(scores, design: TrialDesign) -> float:
    ans = design.choice_pos >= 0
    if not ans.any():
        return 1.0
    s, mask, pos = scores[ans], design.opt_mask[ans], design.choice_pos[ans]

    def nll(log_tau):
        lp = log_probabilities(s, mask, np.exp(log_tau))
        return -lp[np.arange(len(pos)), pos].sum()

    res = minimize_scalar(nll, bounds=LOG_TAU_BOUNDS, method="bounded", options={"xatol": 1e-6})
    return float(np.exp(res.x))


class ScoreBaseline:
    """A fixed score per option and a fitted temperature."""

    n_params = 1

    def __init__(self):
        self.tau: float | None = None

    def scores(self, design: TrialDesign) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def fit(self, design: TrialDesign, rng=None):
        self.tau = fit_tau(self.scores(design), design)
        return self

    def log_probabilities(self, design: TrialDesign) -> np.ndarray:
        if self.tau is None:
            raise StateError(f"{type(self).__name__}: call fit() before log_probabilities()")
        return log_probabilities(self.scores(design), design.opt_mask, self.tau)

    def params(self) -> dict:
        return {"tau": self.tau}


class Frequency(ScoreBaseline):
    name = "frequency"

    def __init__(self, graph: ModelGraph, episodes=None):
        super().__init__()
        self.graph = graph
        self.source = "episodes" if episodes is not None else (
            "graph counts" if graph.counts is not None else "capped graph")
        if episodes is not None:
            self.n_hdp: Counter | None = Counter()
            self.n_hp: Counter = Counter()
            self.n_p: Counter = Counter()
            for e in episodes:
                p = e.get("place")
                if p is None or e.get("hour") is None:
                    continue
                h, d, p = int(e["hour"]), e.get("weekday"), str(p)
                self.n_hdp[(h, None if d is None else int(d), p)] += 1
                self.n_hp[(h, p)] += 1
                self.n_p[p] += 1
        else:
            self.n_hdp = None

    def scores(self, design: TrialDesign) -> np.ndarray:
        out = np.zeros(design.opt_mask.shape)
        if self.n_hdp is not None:
            for t, opts in enumerate(design.options):
                h, d = int(design.hours[t]), int(design.weekdays[t])
                for j, p in enumerate(opts):
                    out[t, j] = self.n_hdp[(h, d, p)] + 1e-3 * self.n_hp[(h, p)] + 1e-6 * self.n_p[p]
            return np.log1p(out)
        mat = self.graph.counts if self.graph.counts is not None else self.graph.capped
        idx = self.graph.index
        for t, opts in enumerate(design.options):
            hi = idx.get(("hour", str(int(design.hours[t]))))
            di = idx.get(("weekday", str(int(design.weekdays[t]))))
            for j, p in enumerate(opts):
                pi = idx.get((PLACE, p))
                if pi is None:
                    continue
                out[t, j] = (mat[hi, pi] if hi is not None else 0.0) + (mat[di, pi] if di is not None else 0.0)
        return np.log1p(out)


class Centrality(ScoreBaseline):
    name = "centrality"

    def __init__(self, graph: ModelGraph):
        super().__init__()
        self.graph = graph
        self._last: tuple[Any, Any] = (None, None)

    def scores(self, design: TrialDesign) -> np.ndarray:
        if self._last[0] is not design:  # identity, not id(): ids are reused after collection
            cache = ActivationCache(self.graph, design)
            act = cache.activations(np.ones(len(self.graph.type_pairs)), 0.0)
            self._last = (design, ratio_scores(act, design.opt_mask)[0])
        return self._last[1]


class EigenModel:
    """The cue-biased eigenvector model fitted by maximum likelihood (L-BFGS-B, restarts)."""

    def __init__(self, spec: ModelSpec, restarts: int = 4, seed: int = 0, maxiter: int = 200):
        self.spec = spec
        self.name = spec.name
        self.restarts = int(restarts)
        self.seed = int(seed)
        self.maxiter = int(maxiter)
        self.p: Any = None
        self.nested: EigenModel | None = None  # the fitted beta = 0 model behind the nested start
        self.nll: float | None = None
        self.objective: float | None = None
        self.runs: list[dict] = []

    @property
    def n_params(self) -> int:
        return self.spec.n_params

    def fit(self, design: TrialDesign, rng=None):
        rng = np.random.default_rng(self.seed) if rng is None else rng
        cache = ActivationCache(self.spec.graph, design)
        f = lambda p: nll_and_grad(self.spec, cache, p)  # noqa: E731
        # Screen SCREEN x restarts seeded draws and start from the best ones: on a
        # disconnected graph the activation jumps between components as β moves,
        # the objective is piecewise smooth, and a local method only finds the
        # piece it starts in.  The box centre is always one of the starts.
        # With one restart no draw is kept (the centre is the only seeded start),
        # so the screen is skipped: the same fit without SCREEN wasted solves.
        best_draws: list = []
        if self.restarts > 1:
            draws = [self.spec.start(rng) for _ in range(SCREEN * self.restarts)]
            values = np.array([negative_log_likelihood(self.spec, cache, q) + self.spec.penalty(q)[0]
                               for q in draws])
            best_draws = [draws[i] for i in np.argsort(values)[: self.restarts - 1]]
        starts = [self.spec.start()] + best_draws + self._nested_starts(design, rng)
        best: Any = None
        self.runs = []
        for p0 in starts:
            res = minimize(f, p0, jac=True, method="L-BFGS-B", bounds=self.spec.bounds(),
                           options={"maxiter": self.maxiter, "ftol": FTOL, "gtol": GTOL, "maxls": MAXLS})
            self.runs.append({"nll": float(res.fun), "converged": bool(res.success), "nit": int(res.nit)})
            if best is None or res.fun < best.fun:
                best = res
        self.p, self.objective = best.x, float(best.fun)
        self.nll = float(negative_log_likelihood(self.spec, cache, best.x))
        self.converged = bool(best.success)
        self.n_eigh = cache.n_eigh
        return self

    def _nested_starts(self, design: TrialDesign, rng) -> list:
        """Starts at the fitted β = 0 (centrality) model with small β.

        The β = 0 model is nested in this one, and for small β the likelihood is
        flat in β (the cue barely moves the eigenvector), so a local method
        started at moderate β never reaches the region where the nested model
        is good.  Starting there too makes the in-sample fit at least as good as
        the nested one (up to the prior).
        """
        spec = self.spec
        self.nested = None
        if not (spec.fit_beta and spec.free):
            return []
        sub = ModelSpec(spec.graph, weights=spec.weights, reference=spec.reference, zero=spec.zero,
                        fit_beta=False, beta_fixed=0.0, name="nested", prior=spec.prior,
                        beta_relative=spec.beta_relative)
        inner = EigenModel(sub, restarts=1, seed=self.seed, maxiter=self.maxiter).fit(design, rng=rng)
        self.nested = inner
        theta_p, tau_p = inner.p[:-1], inner.p[-1]
        return [np.concatenate([theta_p, [LOG_BETA_NESTED_START], [tau_p]])]

    def log_probabilities(self, design: TrialDesign) -> np.ndarray:
        return model_log_probabilities(self.spec, ActivationCache(self.spec.graph, design), self.p)

    def unpacked(self):
        return self.spec.unpack(self.p)

    def params(self) -> dict:
        theta, beta, tau = self.unpacked()
        return {"theta": self.spec.theta_dict(theta), "beta": beta, "tau": tau}


def default_predictors(graph: ModelGraph, *, episodes=None, restarts: int = 4, seed: int = 0) -> dict:
    """The model and every baseline, by name, in report order."""
    return {
        "model": EigenModel(ModelSpec.full(graph), restarts=restarts, seed=seed),
        "chance": Chance(),
        "frequency": Frequency(graph, episodes),
        "centrality": Centrality(graph),
        "time_links": EigenModel(ModelSpec.time_links(graph), restarts=restarts, seed=seed + 1),
    }
