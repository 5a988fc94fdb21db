"""Fast exact solver: one eigendecomposition of W(θ), then a secular equation per trial.

With ``W = U diag(lam) U^T`` and ``z = U^T x`` the trial matrix is
``M = U (diag(lam) + beta z z^T) U^T``, a rank-one update of a diagonal matrix
(Golub 1973; Bunch, Nielsen and Sorensen 1978).  An eigenvalue ``mu`` of ``M``
that is not an eigenvalue of ``W`` solves the secular equation

    1 = beta * sum_i z_i^2 / (mu - lam_i),

and its eigenvector is ``U (z / (mu - lam))``: at node ``k`` the component is
``sum_i U_ki z_i / (mu - lam_i)`` and the squared norm is
``sum_i z_i^2 / (mu - lam_i)^2``, so only the option rows of ``U`` are touched.

Root finding.  Let ``lam*`` be the largest eigenvalue whose eigenspace the cue
touches (group weight above ``ZERO_RTOL |x|^2``) and ``s = mu - lam*``, ``a_i =
lam* - lam_i >= 0`` over the touched terms.  ``phi(s) = sum w_i / (s + a_i)`` is
decreasing and convex on ``s > 0`` and the root ``phi(s) = 1/beta`` lies in
``[beta W_g - a_g, beta |z|^2]`` (``W_g`` the weight of the top touched group, ``a_g`` its spread).  The
root can sit many decades above ``w_*`` when the top weight is tiny, where
Newton on ``phi`` crawls (it only doubles ``s`` per step); in ``u = log s`` the
function ``F(u) = log phi(e^u) + log beta`` has slope in ``[-1, 0)`` and is
exactly linear in both limits, so Newton on ``F``, safeguarded by bisection of
the bracket in ``u``, converges in a handful of steps from any bracket.

Degenerate cases (the canonical rule of :mod:`.retrieval`):

* the cue touches no eigenvalue's space at all (empty cue) or ``beta = 0``: the
  leading eigenspace E of W decides, ``P_E x / |P_E x|`` or ``P_E 1 / |P_E 1|``;
* the cue does not touch E (deflation: a component of a disconnected graph, or
  an eigenvector orthogonal to the cue): the secular root ``mu*`` over the
  touched terms competes with ``lam_max``; if ``mu* >= lam_max`` (within
  tolerance) the secular vector wins, else the leading eigenspace of W with the
  all-ones rule;
* repeated eigenvalues: the secular sum is exact with repeated terms; for the
  touched/untouched decision eigenvalues within ``TIE_RTOL`` are grouped and
  their ``z_i^2`` summed (the update only sees the cue's projection on each
  eigenspace).

Everything is vectorised over the trial axis.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as la

from .retrieval import TIE_RTOL, ZERO_RTOL

MAX_ITER = 100
EIGH_DRIVER = "evr"
U_RTOL = 1e-14  # relative step in u = log s at which the root is taken as found
F_ATOL = 1e-15  # |log phi + log beta| at which the root is taken as found


class TrialState:
    """Solution of a batch of trials in the eigenbasis of W.

    Attributes
    ----------
    coef : (T, n)
        The activation is ``v = U @ coef[t]`` (unit norm).
    mu : (T,)
        Its eigenvalue, the largest of ``W + beta x x^T``.
    secular : (T,) bool
        True where ``v`` is the secular vector (the cue shaped it); False where
        it is a leading eigenvector of W itself (``beta = 0``, empty cue, or an
        untouched leading eigenspace that wins).
    z : (T, n)
        ``U^T x`` with untouched eigenspaces zeroed.
    """

    def __init__(self, coef, mu, secular, z, beta):
        self.coef, self.mu, self.secular, self.z, self.beta = coef, mu, secular, z, beta


class RankOneSolver:
    """Eigendecomposition of one W(θ), reused for any number of trials.

    Parameters
    ----------
    w : (n, n) ndarray
        Symmetric W(θ).
    tie_rtol : float
        Relative tolerance under which eigenvalues are one eigenvalue.
    """

    def __init__(self, w, *, tie_rtol: float = TIE_RTOL):
        w = np.asarray(w, dtype=np.float64)
        n = w.shape[0]
        if w.shape != (n, n):
            raise ValueError(f"W: expected a square matrix, got shape {w.shape}")
        self.n = n
        self.tie_rtol = float(tie_rtol)
        if n:
            # LAPACK's evr (MRRR), scipy's default.  Divide and conquer (evd) was
            # up to 3x faster at n = 300 here, but on the demo-like test graph its
            # eigenvectors moved the analytic gradient at a near-repeated
            # eigenvalue away from finite differences, so evr stays
            # (benchmarks/bench_model.py times the drivers)
            lam, u = la.eigh(w, driver=EIGH_DRIVER)
        else:
            lam, u = np.zeros(0), np.zeros((0, 0))
        self.lam = lam
        # a virtual zero row at index n serves the padding of cue and option indices
        self.u_ext = np.vstack([u, np.zeros((1, n))])
        self.scale = float(np.abs(lam).max()) if n else 0.0
        tol = self.tie_rtol * self.scale
        breaks = np.flatnonzero(np.diff(lam) > tol) + 1 if n else np.zeros(0, dtype=int)
        self.group_start = np.concatenate([[0], breaks]).astype(np.int64) if n else np.zeros(0, dtype=np.int64)
        self.group_of = np.zeros(n, dtype=np.int64)
        if n:
            self.group_of[self.group_start[1:]] = 1
            self.group_of = np.cumsum(self.group_of)
        self.n_groups = len(self.group_start)
        top = slice(self.group_start[-1], n) if n else slice(0, 0)
        self.top = top
        ut = u[:, top]
        c1 = ut.T @ np.ones(n)
        p1 = ut @ c1
        nrm = np.linalg.norm(p1)
        self.ones_vec = np.append(p1 / nrm if nrm > 0 else p1, 0.0)
        self.lam_max = float(lam[-1]) if n else float("nan")

    # ------------------------------------------------------------------
    def cue_coefficients(self, cue_idx, cue_w) -> np.ndarray:
        """``z = U^T x`` for every trial: (T, n) from padded (T, c) cue indices and weights."""
        return np.einsum("tc,tcn->tn", cue_w, self.u_ext[cue_idx])

    def solve(self, cue_idx, cue_w, beta: float, rows, *, return_mu: bool = False):
        """Activation (unit-norm eigenvector) at ``rows`` for every trial.

        Parameters
        ----------
        cue_idx, cue_w : (T, c) arrays
            Cue node indices (``n`` pads) and weights; ``x = sum_j cue_w[t, j] e_{cue_idx[t, j]}``.
        beta : float
            Cue strength, ``>= 0``.
        rows : (T, m) int array
            Node indices to return (``n`` gives 0, for padding and absent nodes).

        Returns
        -------
        act : (T, m) ndarray
            Components of the canonical unit-norm activation at ``rows``.
        mu : (T,) ndarray, only with ``return_mu``
            The leading eigenvalue of ``W + beta x x^T``.
        """
        rows = np.asarray(rows, dtype=np.int64)
        st = self.state(cue_idx, cue_w, beta)
        # batched matrix-vector products (BLAS) rather than einsum's loop
        act = np.zeros(rows.shape) if self.n == 0 else np.matmul(self.u_ext[rows], st.coef[:, :, None])[:, :, 0]
        return (act, st.mu) if return_mu else act

    def state(self, cue_idx, cue_w, beta: float) -> TrialState:
        """Per-trial solution in the eigenbasis of W: ``v = U @ coef`` (see :class:`TrialState`)."""
        beta = float(beta)
        if not np.isfinite(beta) or beta < 0:
            raise ValueError(f"beta = {beta!r}: expected a finite number >= 0")
        cue_idx = np.asarray(cue_idx, dtype=np.int64)
        cue_w = np.asarray(cue_w, dtype=np.float64)
        t_count, n = cue_idx.shape[0], self.n
        if n == 0:
            return TrialState(np.zeros((t_count, 0)), np.full(t_count, np.nan),
                              np.zeros(t_count, dtype=bool), np.zeros((t_count, 0)), beta)
        z = self.cue_coefficients(cue_idx, cue_w)
        x2 = np.einsum("tc,tc->t", cue_w, cue_w)
        w = z * z
        simple = self.n_groups == n  # no tied eigenvalues: every group one element (the usual case)
        if simple:
            touched = w > ZERO_RTOL * x2[:, None]
            elem = touched
        else:
            gw = np.add.reduceat(w, self.group_start, axis=1)  # (T, G)
            touched = gw > ZERO_RTOL * x2[:, None]
            elem = touched[:, self.group_of]  # (T, n)
        np.multiply(z, elem, out=z)
        np.multiply(w, elem, out=w)
        any_touch = touched.any(axis=1)
        top_touched = touched[:, -1]

        coef = np.zeros((t_count, n))
        mu = np.full(t_count, self.lam_max)
        secular = np.zeros(t_count, dtype=bool)
        ones_coef = np.zeros(n)
        ones_coef[self.top] = self.u_ext[:-1, self.top].T @ self.ones_vec[:-1]

        # β = 0 or no cue: leading eigenspace of W decides
        plain = np.ones(t_count, dtype=bool) if beta == 0.0 else ~any_touch
        if plain.any():
            p = plain & top_touched
            if p.any():
                zt = z[p][:, self.top]
                c = np.zeros((int(p.sum()), n))
                c[:, self.top] = zt / np.sqrt((zt * zt).sum(axis=1))[:, None]
                coef[p] = c
            coef[plain & ~top_touched] = ones_coef

        sec = ~plain
        if sec.any():
            every = bool(sec.all())
            zs, ws_, es = (z, w, elem) if every else (z[sec], w[sec], elem[sec])
            rr = np.arange(len(zs))
            # the largest touched eigenvalue per trial (elements sorted ascending)
            last = n - 1 - np.argmax(es[:, ::-1], axis=1)
            lam_star = self.lam[last]
            a = lam_star[:, None] - self.lam[None, :]
            # lower bound of the root from the top touched group (weight W_g, spread a_g)
            if simple:
                w_g = ws_[rr, last]
                lo = w_g * beta
            else:
                g_star = self.group_of[last]
                in_g = self.group_of[None, :] == g_star[:, None]
                w_g = np.where(in_g, ws_, 0.0).sum(axis=1)
                a_g = np.where(in_g, a, 0.0).max(axis=1)
                lo = np.maximum(beta * w_g - a_g, beta * ws_[rr, last])
            lo = np.maximum(lo, np.finfo(float).tiny)
            # untouched terms have w = 0; the eigenvalues above lam* (a < 0) are
            # clamped to a = 0 so that s + a > 0 and their terms stay exactly 0
            np.maximum(a, 0.0, out=a)
            s_ = _secular_root(a, ws_, lo, beta)
            mu_s = lam_star + s_
            c = a
            c += s_[:, None]
            np.divide(zs, c, out=c)  # zs is 0 on untouched terms
            c /= np.sqrt(np.einsum("tn,tn->t", c, c))[:, None]
            # deflation: an untouched leading eigenspace above the secular root wins
            tol = self.tie_rtol * np.maximum(self.scale, np.abs(mu_s))
            loses = (~top_touched[sec]) & (mu_s < self.lam_max - tol)
            c[loses] = ones_coef
            if every:
                coef = c
            else:
                coef[sec] = c
            mu[sec] = np.where(loses, self.lam_max, mu_s)
            sec_rows = np.flatnonzero(sec)
            secular[sec_rows[~loses]] = True
        return TrialState(coef, mu, secular, z, beta)

    def activation(self, x, beta: float) -> np.ndarray:
        """Full canonical activation for one dense cue ``x`` (tests and diagnostics)."""
        x = np.asarray(x, dtype=np.float64).ravel()
        idx = np.flatnonzero(x)
        if len(idx) == 0:
            idx, wts = np.array([self.n]), np.array([0.0])
        else:
            wts = x[idx]
        rows = np.arange(self.n)[None, :]
        return self.solve(idx[None, :], wts[None, :], beta, rows)[0]

    def leading_eigenvalue(self, x, beta: float) -> float:
        x = np.asarray(x, dtype=np.float64).ravel()
        idx = np.flatnonzero(x)
        if len(idx) == 0:
            idx, wts = np.array([self.n]), np.array([0.0])
        else:
            wts = x[idx]
        _, mu = self.solve(idx[None, :], wts[None, :], beta, np.array([[self.n]]), return_mu=True)
        return float(mu[0])


def _secular_root(a, w, lo_s, beta):
    """Root ``s > 0`` of ``beta * sum w / (s + a) = 1`` per row, given a lower bound ``lo_s``.

    ``a >= 0`` everywhere (terms that must not count carry ``w = 0``).  Newton on
    ``F(u) = log phi(e^u) + log beta`` safeguarded by bisection of the bracket
    ``[log lo_s, log(beta sum w)]``; only unconverged rows are iterated, and
    while every row is unconverged the arrays are used in place (no copies).
    """
    eps4 = 4 * np.finfo(float).eps
    lo = np.log(lo_s)
    hi = np.maximum(np.log(beta * w.sum(axis=1)), lo)
    u = lo.copy()
    log_beta = np.log(beta)
    t_all = len(u)
    act = np.flatnonzero(hi - lo > eps4 * np.maximum(1.0, np.abs(hi)))
    buf = np.empty_like(a)
    for _ in range(MAX_ITER):
        if len(act) == 0:
            break
        full = len(act) == t_all
        aa, wa = (a, w) if full else (a[act], w[act])
        inv = buf[: len(act)]
        ua, la, ha = u[act], lo[act], hi[act]
        s = np.exp(ua)
        np.add(aa, s[:, None], out=inv)
        np.reciprocal(inv, out=inv)
        r = wa * inv
        phi = r.sum(axis=1)
        dphi = np.einsum("tn,tn->t", r, inv)
        f = np.log(phi) + log_beta
        fp = -s * dphi / phi
        la = np.where(f > 0, ua, la)
        ha = np.where(f < 0, ua, ha)
        u_new = ua - f / fp
        bad = ~((u_new > la) & (u_new < ha))
        u_new = np.where(bad, 0.5 * (la + ha), u_new)
        # at a root to machine accuracy keep the point itself (a Newton step of
        # zero length would be "outside" the open bracket and trigger a bisection)
        u_new = np.where(np.abs(f) <= F_ATOL, ua, u_new)
        lo[act], hi[act], u[act] = la, ha, u_new
        # stop at machine accuracy of F (rounding noise in phi is ~n eps, so
        # asking for less than a few ulps of u would only oscillate)
        keep = ((np.abs(u_new - ua) > U_RTOL * np.maximum(1.0, np.abs(ua)))
                & (ha - la > eps4 * np.maximum(1.0, np.abs(ha))) & (np.abs(f) > F_ATOL))
        act = act[keep]
    return np.exp(u)


def fast_activation(w, x, beta: float, *, tie_rtol: float = TIE_RTOL) -> np.ndarray:
    """One-off convenience: canonical activation of ``W + beta x x^T`` via :class:`RankOneSolver`."""
    return RankOneSolver(w, tie_rtol=tie_rtol).activation(x, beta)
