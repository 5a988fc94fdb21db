"""Rival models of the participant's choices, fitted and scored like the model.

Every rival is a predictor (``fit(design, rng)``, ``log_probabilities(design)``,
``n_params``, ``name``) so cross-validation treats it exactly as the model, on
the same held-out days, and :mod:`.compare` pairs their per-trial scores.

``chance``
    ``1 / options``.
``most_visited``
    the place visited most often, no time information: score ``ln(1 + n(p))``
    over the episodes, the probed episode left out.
``frequency``
    the frequency table (hour x weekday) computed leave-one-episode-out: score
    ``ln(1 + n(h, d, p) + 1e-3 n(h, p) + 1e-6 n(p))`` with the probed episode
    removed from every count (the small terms only break ties).  Without
    episodes the graph's uncapped counts ``c(hour, p) + c(weekday, p)`` minus
    the probed episode's own contribution (1 to each, for the true place).
``centrality``
    eigenvector centrality of W(θ) with θ free and β = 0 (the same activation
    for every cue).
``time_links``
    the model with every group other than time-place fixed at 0.
``actr``
    ACT-R base-level learning (Anderson and Schooler 1991; the equation as in
    the ACT-R tutorial, unit 4): the activation of place ``p`` for a probe of
    clock hour ``h`` is ``B_p = ln(sum_j t_j^-d)`` over the past visits ``j`` of
    ``p`` at hour ``h`` (the probed episode left out), ``t_j`` the time from the
    visit to the test in hours; the decay ``d`` is fitted (ACT-R's default is
    0.5).  A place never seen at that hour takes ``FALLBACK_SHARE`` times the
    sum over its visits at any hour (common practice, no source), so its
    activation is finite.  Choice: ``p_k ∝ exp(B_k / tau)``.

Each score rival fits a temperature ``tau`` by maximum likelihood (the Luce rule
``p ∝ exp(score / tau)``); ``actr`` also fits ``d``.
"""

from __future__ import annotations

from typing import Any

from collections import Counter

import numpy as np
from scipy.optimize import minimize_scalar

from .baselines import Centrality, Chance, EigenModel, Frequency, fit_tau, ScoreBaseline
from .choice import log_probabilities
from .design import PLACE, ModelGraph, TrialDesign
from .likelihood import ModelSpec

LOG_D_BOUNDS = (np.log(0.01), np.log(3.0))
FALLBACK_SHARE = 0.01
SECONDS_PER_HOUR = 3600.0

RIVALS = ("chance", "most_visited", "frequency", "centrality", "time_links", "actr")
LABELS = {"chance": "chance (1/options)", "most_visited": "most-visited place",
          "frequency": "frequency (hour x weekday, LOEO)", "centrality": "centrality (beta = 0)",
          "time_links": "time-place links only", "actr": "ACT-R base level"}


class EpisodeTable:
    """Episodes as arrays, and each trial's probed episode and test time.

    Parameters
    ----------
    episodes : sequence of dict
        Episode records (``key``, ``utc``, ``hour``, ``weekday``, ``place``).
    """

    def __init__(self, episodes):
        eps = [e for e in episodes if e.get("place") is not None and e.get("hour") is not None]
        self.keys = {str(e.get("key")): i for i, e in enumerate(eps)}
        self.utc = np.array([float(e["utc"]) for e in eps])
        self.hour = np.array([int(e["hour"]) for e in eps], dtype=np.int64)
        self.weekday = np.array([-1 if e.get("weekday") is None else int(e["weekday"]) for e in eps],
                                dtype=np.int64)
        self.place = [str(e["place"]) for e in eps]
        self.places = sorted(set(self.place))
        code = {p: i for i, p in enumerate(self.places)}
        self.place_code = np.array([code[p] for p in self.place], dtype=np.int64)
        self.code = code

    def __len__(self) -> int:
        return len(self.place)

    def probed(self, design: TrialDesign) -> np.ndarray:
        """Row of each trial's probed episode (-1 when unknown)."""
        return np.array([self.keys.get(str(t.get("episode")), -1) for t in design.trials], dtype=np.int64)

    def test_times(self, design: TrialDesign) -> np.ndarray:
        """When each trial was answered (``answered_at``), else issued, else after the last episode."""
        last = float(self.utc.max()) + SECONDS_PER_HOUR if len(self) else 0.0
        out = []
        for t in design.trials:
            v = t.get("answered_at", t.get("issued_at"))
            out.append(last if v is None else float(v))
        return np.array(out)


class MostVisited(ScoreBaseline):
    """The place visited most often, the probed episode left out (no time information)."""

    name = "most_visited"

    def __init__(self, table: EpisodeTable):
        super().__init__()
        self.table = table
        self.n_p = Counter(table.place)

    def scores(self, design: TrialDesign) -> np.ndarray:
        out = np.zeros(design.opt_mask.shape)
        probed = self.table.probed(design)
        for t, opts in enumerate(design.options):
            own = self.table.place[probed[t]] if probed[t] >= 0 else None
            for j, p in enumerate(opts):
                out[t, j] = self.n_p[p] - (p == own)
        return np.log1p(np.maximum(out, 0.0))


class FrequencyLOEO(Frequency):
    """The frequency table (hour x weekday) with the probed episode left out of every count."""

    name = "frequency"

    def __init__(self, graph: ModelGraph, episodes=None):
        super().__init__(graph, episodes)
        self.table = EpisodeTable(episodes) if episodes is not None else None

    def scores(self, design: TrialDesign) -> np.ndarray:
        out = np.zeros(design.opt_mask.shape)
        if self.table is not None:
            assert self.n_hdp is not None  # counted from the same episodes as the table
            probed = self.table.probed(design)
            tab = self.table
            for t, opts in enumerate(design.options):
                h, d = int(design.hours[t]), int(design.weekdays[t])
                r = probed[t]
                own = (tab.hour[r], tab.weekday[r], tab.place[r]) if r >= 0 else None
                for j, p in enumerate(opts):
                    hdp = self.n_hdp[(h, d, p)] - (own == (h, d, p))
                    hp = self.n_hp[(h, p)] - (own is not None and own[0] == h and own[2] == p)
                    pp = self.n_p[p] - (own is not None and own[2] == p)
                    out[t, j] = hdp + 1e-3 * hp + 1e-6 * pp
            return np.log1p(np.maximum(out, 0.0))
        mat = self.graph.counts if self.graph.counts is not None else self.graph.capped
        idx = self.graph.index
        for t, opts in enumerate(design.options):
            hi = idx.get(("hour", str(int(design.hours[t]))))
            di = idx.get(("weekday", str(int(design.weekdays[t]))))
            correct = design.correct_pos[t]
            for j, p in enumerate(opts):
                pi = idx.get((PLACE, p))
                if pi is None:
                    continue
                own_n = 1.0 if j == correct else 0.0  # the probed episode itself, if counts are uncapped
                hv = (mat[hi, pi] - own_n) if hi is not None else 0.0
                dv = (mat[di, pi] - own_n) if di is not None else 0.0
                out[t, j] = max(hv, 0.0) + max(dv, 0.0)
        return np.log1p(out)


def base_level(ages_h, d: float) -> float:
    """ACT-R base-level activation ``ln(sum_j t_j^-d)`` of references ``t_j`` (hours) ago."""
    t = np.asarray(ages_h, dtype=np.float64)
    if t.size == 0 or np.any(t <= 0):
        raise ValueError("base_level: expected at least one reference, all strictly in the past")
    return float(np.log(np.sum(t ** (-float(d)))))


class ACTR:
    """ACT-R base-level learning with the decay ``d`` and the temperature fitted."""

    name = "actr"
    n_params = 2

    def __init__(self, table: EpisodeTable):
        self.table = table
        self.d = 0.5
        self.tau = 1.0
        self._cache: tuple[Any, Any] = (None, None)

    def _parts(self, design: TrialDesign):
        """Per trial: ages (hours) and option index of every usable past visit, split by hour match."""
        if self._cache[0] is design:
            return self._cache[1]
        tab = self.table
        probed = tab.probed(design)
        now = tab.test_times(design)
        parts = []
        for t, opts in enumerate(design.options):
            age = (now[t] - tab.utc) / SECONDS_PER_HOUR
            ok = age > 0
            if probed[t] >= 0:
                ok[probed[t]] = False
            col = np.full(len(tab.code), -1, dtype=np.int64)
            for j, p in enumerate(opts):
                if p in tab.code:
                    col[tab.code[p]] = j
            opt_of = col[tab.place_code]
            use = ok & (opt_of >= 0)
            same = use & (tab.hour == int(design.hours[t]))
            parts.append((age[same], opt_of[same], age[use], opt_of[use], len(opts)))
        self._cache = (design, parts)
        return parts

    def scores_at(self, design: TrialDesign, d: float) -> np.ndarray:
        out = np.zeros(design.opt_mask.shape)
        for t, (a_s, o_s, a_all, o_all, m) in enumerate(self._parts(design)):
            s_same = np.bincount(o_s, weights=a_s ** (-d), minlength=m)
            s_all = np.bincount(o_all, weights=a_all ** (-d), minlength=m)
            out[t, :m] = np.log(np.where(s_same > 0, s_same, FALLBACK_SHARE * s_all) + 1e-300)
        return out

    def scores(self, design: TrialDesign) -> np.ndarray:
        return self.scores_at(design, self.d)

    def fit(self, design: TrialDesign, rng=None):
        ans = design.choice_pos >= 0
        pos, mask = design.choice_pos[ans], design.opt_mask[ans]

        def nll(log_d):
            s = self.scores_at(design, float(np.exp(log_d)))
            tau = fit_tau(s, design)
            lp = log_probabilities(s[ans], mask, tau)
            return -lp[np.arange(len(pos)), pos].sum()

        res = minimize_scalar(nll, bounds=LOG_D_BOUNDS, method="bounded", options={"xatol": 1e-3})
        self.d = float(np.exp(res.x))
        self.tau = fit_tau(self.scores_at(design, self.d), design)
        return self

    def log_probabilities(self, design: TrialDesign) -> np.ndarray:
        return log_probabilities(self.scores(design), design.opt_mask, self.tau)

    def params(self) -> dict:
        return {"d": self.d, "tau": self.tau}


def centrality_spec(graph: ModelGraph, weights: str = "grouped") -> ModelSpec:
    """θ free (time-place fixed to 1), β = 0: eigenvector centrality of W(θ)."""
    spec = ModelSpec.full(graph, name="centrality", weights=weights)
    spec.fit_beta = False
    spec.beta_fixed = 0.0
    return spec


def model_and_rivals(graph: ModelGraph, *, episodes=None, restarts: int = 4, seed: int = 0,
                     weights: str = "grouped") -> dict:
    """The model and every rival, by name, in report order.

    Without episodes ``most_visited`` and ``actr`` are left out (they need visit
    times) and ``frequency`` uses the graph's counts.
    """
    preds = {"model": EigenModel(ModelSpec.full(graph, weights=weights), restarts=restarts, seed=seed),
             "chance": Chance()}
    table = EpisodeTable(episodes) if episodes is not None else None
    if table is not None:
        preds["most_visited"] = MostVisited(table)
    preds["frequency"] = FrequencyLOEO(graph, episodes)
    if graph.type_pairs:
        preds["centrality"] = EigenModel(centrality_spec(graph, weights), restarts=restarts, seed=seed + 2)
    else:  # pragma: no cover - a graph without edges is refused before
        preds["centrality"] = Centrality(graph)
    preds["time_links"] = EigenModel(ModelSpec.time_links(graph, weights=weights), restarts=restarts,
                                     seed=seed + 1)
    if table is not None:
        preds["actr"] = ACTR(table)
    return preds
