"""Parameterisation and likelihood of the cue-biased eigenvector model.

Parameters and their normalisation.  The activation is unchanged when W(θ) and
β are multiplied by the same factor (the eigenvector of ``c M`` is that of
``M``), so only ratios are identifiable.  Type-pair weights come in groups
(:class:`ModelSpec`): by default three classes (time-place, place-context,
and non-place: every link touching no place), or the five classes of kind
families (``weights = "classes5"``: time-place, time-time, time-context,
place-context, context-context; time = hour, weekday, week; context = sound,
motion, mood), or one per kind pair (``weights = "full"``).  The time-place
group (``hour|place`` when full) is fixed to 1 (it carries the cue's direct
route to the options).  The free parameters, all on a log scale for L-BFGS-B
with box bounds, are the other groups, ``β`` and ``τ``;
a weight at its lower bound (``1e-3``) means "this group does not matter",
which the log scale cannot write as an exact 0.

Option scores are the scale-free ratio scores of :func:`.choice.ratio_scores`:
the eigenvector's global scale (which shrinks on the options like ``1/β`` once
the cue dominates) cannot stand in for the temperature, so β and τ are
separately identified (shown by recovery, ``docs/model.md``).
"""

from __future__ import annotations

from typing import Any

from dataclasses import dataclass, field

import numpy as np

from .choice import log_probabilities, ratio_scores
from .design import ModelGraph, TrialDesign, pair_key
from .retrieval import TIE_RTOL
from .secular import RankOneSolver

LOG_THETA_BOUNDS = (np.log(1e-3), np.log(1e3))
LOG_BETA_BOUNDS = (np.log(1e-3), np.log(1e3))
LOG_TAU_BOUNDS = (np.log(1e-2), np.log(1e2))
# Weak log-normal priors (penalised likelihood, i.e. MAP): with ~20 type pairs
# and ~100 trials pure maximum likelihood drives weights to their bounds and τ
# to 0 (a near-deterministic fit of the training choices that fails held out).
# Centre and standard deviation per parameter on the log scale; PRIOR_SD = None
# in a ModelSpec gives plain maximum likelihood.
# τ is the exponent of the Luce ratio rule p ∝ ratio^(1/τ) (see choice.ratio_scores):
# τ = 1 is choice in proportion to activation, the prior's centre.
PRIOR_CENTRE = {"theta": 0.0, "beta": 0.0, "tau": 0.0}
PRIOR_SD = {"theta": 1.0, "beta": 1.5, "tau": 1.5}
# where seeded restarts start (log scale); restart 0 starts at the centre
START_BOX = {"theta": (np.log(0.2), np.log(5.0)), "beta": (np.log(0.1), np.log(10.0)),
             "tau": (np.log(0.1), np.log(3.0))}
START_CENTRE = {"theta": 0.0, "beta": 0.0, "tau": np.log(0.5)}

TIME_PLACE = ("hour|place", "place|weekday", "place|week")

# Grouped type-pair weight classes (the default parameterisation): kinds fall in
# three families and a pair's class is its two families.
FAMILY = {"hour": "time", "weekday": "time", "week": "time", "place": "place",
          "sound": "context", "motion": "context", "mood": "context"}
CLASS_ORDER = ("time-place", "time-time", "time-context", "place-context", "context-context",
               "place-place")
REFERENCE_CLASS = "time-place"
# The default grouping ("grouped") merges the classes that recovery cannot tell
# apart at a few hundred answered trials (docs/model.md, "Identifiable
# grouping"): every link that touches no place -- time-time, time-context,
# context-context -- shares one weight ("non-place").  "classes5" is the
# five-class grouping above; "full" one weight per kind pair.
COARSE = {"time-place": "time-place", "place-context": "place-context", "place-place": "place-place",
          "time-time": "non-place", "time-context": "non-place", "context-context": "non-place"}
COARSE_ORDER = ("time-place", "place-context", "non-place", "place-place")
# "classes2": the cue's direct route to the options (time-place, the reference)
# against everything else ("other"): one free weight, the fewest a graph
# weighting can have and still be more than eigenvector centrality of the raw counts.
CLASSES2 = {c: ("time-place" if c == "time-place" else "other") for c in CLASS_ORDER}
CLASSES2_ORDER = ("time-place", "other")
WEIGHTS = ("grouped", "classes5", "classes2", "full")
# The groupings every fit considers by default (``weights="auto"``, docs/model.md,
# "Choosing the grouping per participant"): recovery around each fit, then the
# best held-out log-likelihood among those whose parameters are all identifiable.
GROUPING_CANDIDATES = ("grouped", "classes5", "classes2")


def pair_class(pair) -> str:
    """``("hour", "place")`` -> ``"time-place"`` (spelled as in :data:`CLASS_ORDER`)."""
    fa, fb = (FAMILY.get(k, k) for k in pair)
    for name in (f"{fa}-{fb}", f"{fb}-{fa}"):
        if name in CLASS_ORDER:
            return name
    return "-".join(sorted((fa, fb)))


@dataclass
class ModelSpec:
    """Which parameters are free and which fixed.

    Type-pair weights come in *groups*: one group per kind pair (``weights =
    "full"``), one per class of :data:`CLASS_ORDER` (``"classes5"``), or,
    the default ``"grouped"``, one per class of :data:`COARSE_ORDER` (the
    classes touching no place merged into ``"non-place"``, see :data:`COARSE`).
    Every pair of a group shares its weight.

    Attributes
    ----------
    graph : ModelGraph
    weights : {"grouped", "classes5", "classes2", "full"}
    reference : str or None
        Name of the group fixed to 1.
    zero : tuple of str
        Groups fixed to 0 (the time-links rival zeroes every other group).
    fit_beta : bool
        False fixes ``beta`` to ``beta_fixed`` (0 for the centrality rival).
    beta_relative : bool
        True (default): the parameter ``beta`` is the cue strength relative to
        the leading eigenvalue of W(θ), ``M = W + beta * lambda_1(W) x x^T``, so
        it means the same whatever the scale the θ give W, and does not trade
        off against them.  False: ``beta`` is absolute.
    """

    graph: ModelGraph
    weights: str = "grouped"
    reference: str | None = None
    zero: tuple = ()
    fit_beta: bool = True
    beta_fixed: float = 0.0
    fit_theta: bool = True
    name: str = "model"
    prior: bool = True
    beta_relative: bool = True
    free: list = field(init=False)

    def __post_init__(self):
        if self.weights not in WEIGHTS:
            raise ValueError(f"weights {self.weights!r}: expected one of {list(WEIGHTS)}")
        keys = [pair_key(p) for p in self.graph.type_pairs]
        if self.weights == "full":
            names = keys
            of = list(range(len(keys)))
        else:
            cls = [pair_class(p) for p in self.graph.type_pairs]
            order: tuple[str, ...] = CLASS_ORDER
            if self.weights == "grouped":
                cls = [COARSE.get(c, c) for c in cls]
                order = COARSE_ORDER
            elif self.weights == "classes2":
                cls = [CLASSES2.get(c, "other") for c in cls]
                order = CLASSES2_ORDER
            names = [c for c in order if c in cls] + sorted({c for c in cls if c not in order})
            of = [names.index(c) for c in cls]
        self.group_names: list[str] = names
        self.pair_group = np.array(of, dtype=np.int64)
        for g in (*self.zero, *(() if self.reference is None else (self.reference,))):
            if g not in names:
                raise ValueError(f"group {g!r}: not among this graph's groups {names}")
        fixed = {names.index(g) for g in self.zero}
        if self.reference is not None:
            fixed.add(names.index(self.reference))
        self.free = [k for k in range(len(names)) if k not in fixed] if self.fit_theta else []

    @classmethod
    def full(cls, graph: ModelGraph, name: str = "model", weights: str = "grouped") -> ModelSpec:
        spec = cls(graph, weights=weights, name=name)
        spec.reference = reference_group(spec)
        spec.__post_init__()
        return spec

    @classmethod
    def time_links(cls, graph: ModelGraph, weights: str = "grouped") -> ModelSpec:
        spec = cls(graph, weights=weights, name="time_links")
        keys = [pair_key(p) for p in graph.type_pairs]
        keep = set()
        for k, key in enumerate(keys):
            if key in TIME_PLACE:
                keep.add(spec.group_names[spec.pair_group[k]])
        spec.zero = tuple(g for g in spec.group_names if g not in keep)
        spec.reference = reference_group(spec, allowed=[g for g in spec.group_names if g in keep])
        spec.__post_init__()
        return spec

    # -- parameter vector --------------------------------------------------
    @property
    def n_params(self) -> int:
        return len(self.free) + int(self.fit_beta) + 1

    def names(self) -> list[str]:
        out = [f"theta[{self.group_names[k]}]" for k in self.free]
        if self.fit_beta:
            out.append("beta")
        return out + ["tau"]

    def bounds(self) -> list[tuple[float, float]]:
        return ([LOG_THETA_BOUNDS] * len(self.free) + ([LOG_BETA_BOUNDS] if self.fit_beta else [])
                + [LOG_TAU_BOUNDS])

    def group_values(self, p) -> np.ndarray:
        """θ per group (1 for the reference, 0 for zeroed groups)."""
        p = np.asarray(p, dtype=np.float64)
        g = np.ones(len(self.group_names))
        g[[self.group_names.index(z) for z in self.zero]] = 0.0
        g[self.free] = np.exp(p[: len(self.free)])
        return g

    def unpack(self, p):
        """``(theta per type pair, beta, tau)`` from the packed log parameters."""
        p = np.asarray(p, dtype=np.float64)
        theta = self.group_values(p)[self.pair_group]
        i = len(self.free)
        if self.fit_beta:
            beta = float(np.exp(p[i]))
            i += 1
        else:
            beta = float(self.beta_fixed)
        return theta, beta, float(np.exp(p[i]))

    def pack(self, theta, beta, tau) -> np.ndarray:
        """Packed log parameters; ``theta`` is per group (``len(group_names)``)."""
        theta = np.asarray(theta, dtype=np.float64)
        parts = [np.log(np.maximum(theta[self.free], 1e-300))]
        if self.fit_beta:
            parts.append([np.log(max(beta, 1e-300))])
        parts.append([np.log(tau)])
        return np.clip(np.concatenate(parts), [b[0] for b in self.bounds()], [b[1] for b in self.bounds()])

    def _keys(self) -> list[str]:
        return ["theta"] * len(self.free) + (["beta"] if self.fit_beta else []) + ["tau"]

    def penalty(self, p):
        """Negative log prior (up to a constant) and its gradient; zeros without a prior."""
        p = np.asarray(p, dtype=np.float64)
        if not self.prior:
            return 0.0, np.zeros_like(p)
        keys = self._keys()
        c = np.array([PRIOR_CENTRE[k] for k in keys])
        sd = np.array([PRIOR_SD[k] for k in keys])
        r = (p - c) / sd
        return float(0.5 * (r * r).sum()), r / sd

    def start(self, rng=None) -> np.ndarray:
        """Restart point: the centre of the start box, or a uniform draw from it."""
        keys = self._keys()
        if rng is None:
            return np.array([START_CENTRE[k] for k in keys])
        return np.array([rng.uniform(*START_BOX[k]) for k in keys])

    def absolute_beta(self, beta: float, solver) -> float:
        """The cue strength entering ``W + beta x x^T`` (see ``beta_relative``)."""
        if not self.beta_relative:
            return float(beta)
        lam = float(solver.lam_max) if solver.n else 0.0
        return float(beta) * lam if lam > 0 else float(beta)

    def theta_dict(self, theta) -> dict[str, float]:
        """θ per type pair (``"hour|place"``), from θ per pair."""
        return self.graph.theta_dict(theta)

    def group_dict(self, p) -> dict[str, float]:
        """θ per group name, from the packed parameters."""
        return {n: float(v) for n, v in zip(self.group_names, self.group_values(p), strict=True)}


def reference_group(spec: ModelSpec, allowed=None) -> str | None:
    """The group fixed to 1: the time-place class (``hour|place`` when full), else the first."""
    names = spec.group_names
    allowed = list(names) if allowed is None else list(allowed)
    if not allowed:
        return None
    for want in (REFERENCE_CLASS, "hour|place"):
        if want in allowed:
            return want
    return allowed[0]


def reference_pair(graph: ModelGraph, allowed=None) -> int | None:
    keys = [pair_key(p) for p in graph.type_pairs]
    allowed = list(range(len(keys))) if allowed is None else list(allowed)
    if not allowed:
        return None
    if "hour|place" in keys and keys.index("hour|place") in allowed:
        return keys.index("hour|place")
    return allowed[0]


class ActivationCache:
    """Option activations ``sqrt(n) * v`` for a design, reusing the eigendecomposition per θ.

    Finite-difference gradients perturb one coordinate at a time, so steps in β
    and τ reuse the decomposition of the last W(θ) and steps in τ reuse the
    activations.
    """

    def __init__(self, graph: ModelGraph, design: TrialDesign):
        self.graph, self.design = graph, design
        self._theta_key: Any = None
        self._solver: Any = None
        self._act_key: Any = None
        self._act: Any = None
        self.n_eigh = 0

    def solver(self, theta) -> RankOneSolver:
        theta = np.asarray(theta, dtype=np.float64)
        if not np.all(np.isfinite(theta)):
            raise ValueError(f"theta {theta.tolist()}: expected finite weights")
        key = theta.tobytes()
        if key != self._theta_key:
            self._solver = RankOneSolver(self.graph.dense_w(theta))
            self._theta_key = key
            self.n_eigh += 1
        return self._solver

    def activations(self, theta, beta: float) -> np.ndarray:
        key = (np.asarray(theta, dtype=np.float64).tobytes(), float(beta))
        if key != self._act_key:
            d = self.design
            v = self.solver(theta).solve(d.cue_idx, d.cue_w, beta, d.opt_idx)
            self._act = np.sqrt(self.graph.n) * v
            self._act_key = key
        return self._act


def model_log_probabilities(spec: ModelSpec, cache: ActivationCache, p) -> np.ndarray:
    theta, beta, tau = spec.unpack(p)
    mask = cache.design.opt_mask
    beta = spec.absolute_beta(beta, cache.solver(theta))
    return log_probabilities(ratio_scores(cache.activations(theta, beta), mask)[0], mask, tau)


def negative_log_likelihood(spec: ModelSpec, cache: ActivationCache, p) -> float:
    """``-sum log p(choice)`` over answered trials (skipped trials do not count)."""
    d = cache.design
    lp = model_log_probabilities(spec, cache, p)
    ans = d.choice_pos >= 0
    return float(-lp[ans, d.choice_pos[ans]].sum())


def nll_and_grad(spec: ModelSpec, cache: ActivationCache, p):
    """Objective (negative log-likelihood plus the prior penalty) and its gradient.

    Gradient in the packed (log) parameters.

    The eigenvector derivative is ``dv = -(M - mu I)^+ (dM) v`` (first-order
    perturbation of a simple eigenpair).  Rather than one solve per parameter,
    the adjoint ``q = (M - mu I)^+ g`` (``g`` = dNLL/dv, nonzero at the option
    rows only) is computed once per trial in the eigenbasis of W, where
    ``M - mu I`` is diagonal plus rank one:

    * secular trials: ``y = r/D - (c . r/D) c`` with ``D = lam - mu``, ``r`` the
      projected ``U^T g`` and ``c`` the eigenvector's coordinates (the rank-one
      term cancels exactly because ``mu`` solves the secular equation);
    * trials whose activation is an eigenvector of W (empty cue, or an
      untouched leading eigenspace that wins): Sherman-Morrison on the
      complement of the leading eigenspace.

    Then ``dNLL/dtheta_p = -sum_t q^T E_p v`` over the edges of pair ``p`` and
    ``dNLL/dbeta = -sum_t (q . x)(x . v)``.  Exact wherever the leading
    eigenvalue is simple; at a repeated one the activation is not differentiable.
    """
    g = cache.graph
    d = cache.design
    theta, beta_param, tau = spec.unpack(p)
    solver = cache.solver(theta)
    beta = spec.absolute_beta(beta_param, solver)
    st = solver.state(d.cue_idx, d.cue_w, beta)
    n = g.n
    u_ext = solver.u_ext
    u_opt = u_ext[d.opt_idx]  # (T, m, n)
    a = np.matmul(u_opt, st.coef[:, :, None])[:, :, 0]  # scores are scale-free: v itself will do
    mask = d.opt_mask
    score, den, _ = ratio_scores(a, mask)
    lp = log_probabilities(score, mask, tau)
    ans = d.choice_pos >= 0
    rows = np.flatnonzero(ans)
    nll = float(-lp[rows, d.choice_pos[rows]].sum())
    pen, pen_grad = spec.penalty(p)

    prob = np.where(mask, np.exp(lp), 0.0)
    y1 = np.zeros_like(prob)
    y1[rows, d.choice_pos[rows]] = 1.0
    dl = (prob - y1) * ans[:, None]  # dNLL / dlogit
    logit = np.where(mask, score / tau, 0.0)
    grad = np.zeros(spec.n_params)
    grad[-1] = float(-(dl * logit).sum())  # d logit / d log tau = -logit
    if not spec.free and not spec.fit_beta:
        return nll + pen, grad + pen_grad

    # dNLL / dv at the option rows through s_k = ln(v_k + eps * mean_j v_j):
    # ds_k / dv_i = (delta_ki + eps / m) / den_k (zero where v_i was clipped at 0)
    from .choice import RATIO_EPS

    q_k = np.where(mask, dl / den, 0.0)
    m_opts = mask.sum(axis=1, keepdims=True)
    gv = (q_k + RATIO_EPS / m_opts * q_k.sum(axis=1, keepdims=True)) / tau
    gv = np.where(mask & (a > 0), gv, 0.0)
    r = np.einsum("tmn,tm->tn", u_opt, gv)
    c = st.coef
    r = r - (r * c).sum(axis=1, keepdims=True) * c
    lam = solver.lam
    y = np.zeros_like(r)
    sec = st.secular
    if sec.any():
        dd = lam[None, :] - st.mu[sec][:, None]
        # an eigenvalue of W tying with mu (an untouched eigenspace at the
        # secular root) is a point where v is not differentiable: no gradient
        # through that direction rather than an infinite one
        ok = np.abs(dd) > TIE_RTOL * np.maximum(solver.scale, np.abs(st.mu[sec]))[:, None]
        ys = np.where(ok, r[sec] / np.where(ok, dd, 1.0), 0.0)
        ys -= (ys * c[sec]).sum(axis=1, keepdims=True) * c[sec]
        y[sec] = ys
    oth = ~sec
    if oth.any():
        off = (np.arange(n) < solver.top.start) & (
            np.abs(lam - solver.lam_max) > TIE_RTOL * max(solver.scale, 1e-300))
        dd = np.where(off, lam - solver.lam_max, 1.0)[None, :]
        ro = np.where(off, r[oth], 0.0)
        zo = np.where(off, st.z[oth], 0.0)
        yo = ro / dd
        if beta > 0:
            zd = zo / dd
            den = 1.0 + beta * (zo * zd).sum(axis=1, keepdims=True)
            den = np.where(np.abs(den) > 1e-12, den, np.inf)  # singular: drop the rank-one term
            yo = yo - beta * zd * (zd * ro).sum(axis=1, keepdims=True) / den
        y[oth] = yo
    u = u_ext[:-1]
    q = y @ u.T  # (T, n)
    v = c @ u.T
    k = 0
    if spec.free:
        er, ec, ev = g.edge_rows, g.edge_cols, g.edge_vals
        per_edge = (ev[None, :] * (q[:, er] * v[:, ec] + q[:, ec] * v[:, er])).sum(axis=0)
        per_pair = np.bincount(g.edge_pair, weights=per_edge, minlength=len(g.type_pairs))
        per_group = np.bincount(spec.pair_group, weights=per_pair, minlength=len(spec.group_names))
        gvals = spec.group_values(p)
        grad[: len(spec.free)] = -per_group[spec.free] * gvals[spec.free]
        k = len(spec.free)
    if spec.fit_beta:
        q_ext = np.concatenate([q, np.zeros((len(q), 1))], axis=1)
        v_ext = np.concatenate([v, np.zeros((len(v), 1))], axis=1)
        qx = (np.take_along_axis(q_ext, d.cue_idx, axis=1) * d.cue_w).sum(axis=1)
        vx = (np.take_along_axis(v_ext, d.cue_idx, axis=1) * d.cue_w).sum(axis=1)
        grad[k] = float(-(qx * vx).sum() * beta)  # d NLL / d log(absolute beta)
        lam1 = float(solver.lam_max)
        if spec.beta_relative and spec.free and lam1 > 0:
            # absolute beta = b * lambda_1(θ): d lambda_1 / d θ_p = u1^T E_p u1
            # (first-order perturbation of the leading eigenvalue)
            u1 = u_ext[:-1, -1]
            er, ec, ev = g.edge_rows, g.edge_cols, g.edge_vals
            dl_pair = np.bincount(g.edge_pair, weights=2.0 * ev * u1[er] * u1[ec],
                                  minlength=len(g.type_pairs))
            dl_group = np.bincount(spec.pair_group, weights=dl_pair, minlength=len(spec.group_names))
            gvals = spec.group_values(p)
            grad[: len(spec.free)] += grad[k] * dl_group[spec.free] * gvals[spec.free] / lam1
    if not np.all(np.isfinite(grad)):  # pragma: no cover - a last guard for L-BFGS-B
        grad = np.where(np.isfinite(grad), grad, 0.0)
    return nll + pen, grad + pen_grad
