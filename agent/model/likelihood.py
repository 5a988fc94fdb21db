"""Parameterisation and likelihood of the cue-biased eigenvector model.

Parameters and their normalisation.  The activation is unchanged when W(θ) and
β are multiplied by the same factor (the eigenvector of ``c M`` is that of
``M``), so only ratios are identifiable.  One type-pair weight is therefore
fixed to 1: ``hour|place`` when that pair has edges (it carries the cue's
direct route to the options), else the first pair in sorted order.  The free
parameters, all on a log scale for L-BFGS-B with box bounds, are the other θ,
``β`` and ``τ``; a weight at its lower bound (``1e-3``) means "this pair does
not matter", which the log scale cannot write as an exact 0.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .choice import log_probabilities
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
PRIOR_CENTRE = {"theta": 0.0, "beta": 0.0, "tau": np.log(0.3)}
PRIOR_SD = {"theta": 1.0, "beta": 1.5, "tau": 2.0}
# where seeded restarts start (log scale); restart 0 starts at the centre
START_BOX = {"theta": (np.log(0.2), np.log(5.0)), "beta": (np.log(0.1), np.log(10.0)),
             "tau": (np.log(0.05), np.log(1.0))}
START_CENTRE = {"theta": 0.0, "beta": 0.0, "tau": np.log(0.2)}

TIME_PLACE = ("hour|place", "place|weekday", "place|week")


@dataclass
class ModelSpec:
    """Which parameters are free and which fixed.

    Attributes
    ----------
    graph : ModelGraph
    reference : int or None
        Index (in ``graph.type_pairs``) of the pair fixed to 1.
    zero : tuple of int
        Pairs fixed to 0 (the time-links baseline zeroes every non time-place pair).
    fit_beta : bool
        False fixes ``beta`` to ``beta_fixed`` (0 for the centrality baseline).
    """

    graph: ModelGraph
    reference: int | None = None
    zero: tuple = ()
    fit_beta: bool = True
    beta_fixed: float = 0.0
    fit_theta: bool = True
    name: str = "model"
    prior: bool = True
    free: list = field(init=False)

    def __post_init__(self):
        n_pairs = len(self.graph.type_pairs)
        fixed = set(self.zero)
        if self.reference is not None:
            fixed.add(self.reference)
        self.free = [k for k in range(n_pairs) if k not in fixed] if self.fit_theta else []

    @classmethod
    def full(cls, graph: ModelGraph, name: str = "model") -> "ModelSpec":
        return cls(graph, reference=reference_pair(graph), name=name)

    @classmethod
    def time_links(cls, graph: ModelGraph) -> "ModelSpec":
        keys = [pair_key(p) for p in graph.type_pairs]
        zero = tuple(k for k, key in enumerate(keys) if key not in TIME_PLACE)
        ref = reference_pair(graph, allowed=[k for k in range(len(keys)) if k not in zero])
        return cls(graph, reference=ref, zero=zero, name="time_links")

    # -- parameter vector --------------------------------------------------
    @property
    def n_params(self) -> int:
        return len(self.free) + int(self.fit_beta) + 1

    def names(self) -> list[str]:
        out = [f"theta[{pair_key(self.graph.type_pairs[k])}]" for k in self.free]
        if self.fit_beta:
            out.append("beta")
        return out + ["tau"]

    def bounds(self) -> list[tuple[float, float]]:
        return ([LOG_THETA_BOUNDS] * len(self.free) + ([LOG_BETA_BOUNDS] if self.fit_beta else [])
                + [LOG_TAU_BOUNDS])

    def unpack(self, p):
        p = np.asarray(p, dtype=np.float64)
        theta = np.ones(len(self.graph.type_pairs))
        theta[list(self.zero)] = 0.0
        theta[self.free] = np.exp(p[: len(self.free)])
        i = len(self.free)
        if self.fit_beta:
            beta = float(np.exp(p[i]))
            i += 1
        else:
            beta = float(self.beta_fixed)
        return theta, beta, float(np.exp(p[i]))

    def pack(self, theta, beta, tau) -> np.ndarray:
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
        keys = ["theta"] * len(self.free) + (["beta"] if self.fit_beta else []) + ["tau"]
        if rng is None:
            return np.array([START_CENTRE[k] for k in keys])
        return np.array([rng.uniform(*START_BOX[k]) for k in keys])

    def theta_dict(self, theta) -> dict[str, float]:
        return self.graph.theta_dict(theta)


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
        self._theta_key = None
        self._solver = None
        self._act_key = None
        self._act = None
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
    return log_probabilities(cache.activations(theta, beta), cache.design.opt_mask, tau)


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
    theta, beta, tau = spec.unpack(p)
    solver = cache.solver(theta)
    st = solver.state(d.cue_idx, d.cue_w, beta)
    n = g.n
    u_ext = solver.u_ext
    u_opt = u_ext[d.opt_idx]  # (T, m, n)
    a = np.sqrt(n) * np.einsum("tmn,tn->tm", u_opt, st.coef)
    mask = d.opt_mask
    lp = log_probabilities(a, mask, tau)
    ans = d.choice_pos >= 0
    rows = np.flatnonzero(ans)
    nll = float(-lp[rows, d.choice_pos[rows]].sum())
    pen, pen_grad = spec.penalty(p)

    prob = np.where(mask, np.exp(lp), 0.0)
    y1 = np.zeros_like(prob)
    y1[rows, d.choice_pos[rows]] = 1.0
    dl = (prob - y1) * ans[:, None]  # dNLL / dlogit
    logit = np.where(mask, a / tau, 0.0)
    grad = np.zeros(spec.n_params)
    grad[-1] = float(-(dl * logit).sum())  # d logit / d log tau = -logit
    if not spec.free and not spec.fit_beta:
        return nll + pen, grad + pen_grad

    gv = dl * np.sqrt(n) / tau  # dNLL / dv at the option rows
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
        grad[: len(spec.free)] = -per_pair[spec.free] * theta[spec.free]
        k = len(spec.free)
    if spec.fit_beta:
        q_ext = np.concatenate([q, np.zeros((len(q), 1))], axis=1)
        v_ext = np.concatenate([v, np.zeros((len(v), 1))], axis=1)
        qx = (np.take_along_axis(q_ext, d.cue_idx, axis=1) * d.cue_w).sum(axis=1)
        vx = (np.take_along_axis(v_ext, d.cue_idx, axis=1) * d.cue_w).sum(axis=1)
        grad[k] = float(-(qx * vx).sum() * beta)
    if not np.all(np.isfinite(grad)):  # pragma: no cover - a last guard for L-BFGS-B
        grad = np.where(np.isfinite(grad), grad, 0.0)
    return nll + pen, grad + pen_grad
