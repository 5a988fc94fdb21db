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
            lam, u = la.eigh(w)
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
        beta = float(beta)
        if not np.isfinite(beta) or beta < 0:
            raise ValueError(f"beta = {beta!r}: expected a finite number >= 0")
        cue_idx = np.asarray(cue_idx, dtype=np.int64)
        cue_w = np.asarray(cue_w, dtype=np.float64)
        rows = np.asarray(rows, dtype=np.int64)
        t_count, n = cue_idx.shape[0], self.n
        if n == 0:
            out = np.zeros(rows.shape)
            return (out, np.full(t_count, np.nan)) if return_mu else out
        z = self.cue_coefficients(cue_idx, cue_w)
        x2 = np.einsum("tc,tc->t", cue_w, cue_w)
        w = z * z
        gw = np.add.reduceat(w, self.group_start, axis=1)  # (T, G)
        touched = gw > ZERO_RTOL * x2[:, None]
        elem = touched[:, self.group_of]  # (T, n)
        z = np.where(elem, z, 0.0)
        w = z * z
        any_touch = touched.any(axis=1)
        top_touched = touched[:, -1]
        u_rows = self.u_ext[rows]  # (T, m, n)

        act = np.zeros(rows.shape)
        mu = np.full(t_count, self.lam_max)
        ones_rows = self.ones_vec[rows]

        # β = 0 or no cue: leading eigenspace of W decides
        if beta == 0.0:
            plain = np.ones(t_count, dtype=bool)
        else:
            plain = ~any_touch
        if plain.any():
            p = plain & top_touched
            if p.any():
                zt = z[p][:, self.top]
                y = np.einsum("tmk,tk->tm", u_rows[p][:, :, self.top], zt)
                act[p] = y / np.sqrt((zt * zt).sum(axis=1))[:, None]
            q = plain & ~top_touched
            act[q] = ones_rows[q]

        sec = ~plain
        if sec.any():
            zs, ws_, es = z[sec], w[sec], elem[sec]
            # the largest touched eigenvalue per trial (elements sorted ascending)
            last = n - 1 - np.argmax(es[:, ::-1], axis=1)
            lam_star = self.lam[last]
            a = lam_star[:, None] - self.lam[None, :]
            # lower bound of the root from the top touched group (weight W_g, spread a_g)
            g_star = self.group_of[last]
            in_g = self.group_of[None, :] == g_star[:, None]
            w_g = np.where(in_g, ws_, 0.0).sum(axis=1)
            a_g = np.where(in_g, a, 0.0).max(axis=1)
            lo = np.maximum(beta * w_g - a_g, beta * ws_[np.arange(len(last)), last])
            lo = np.maximum(lo, np.finfo(float).tiny)
            s = _secular_root(a, ws_, es, lo, beta)
            mu_s = lam_star + s
            denom = np.where(es, s[:, None] + a, 1.0)
            coef = np.where(es, zs / denom, 0.0)
            nrm = np.sqrt((coef * coef).sum(axis=1))
            y = np.einsum("tmn,tn->tm", u_rows[sec], coef) / nrm[:, None]
            # deflation: an untouched leading eigenspace above the secular root wins
            tol = self.tie_rtol * np.maximum(self.scale, np.abs(mu_s))
            loses = (~top_touched[sec]) & (mu_s < self.lam_max - tol)
            y[loses] = ones_rows[sec][loses]
            mu_s = np.where(loses, self.lam_max, mu_s)
            act[sec] = y
            mu[sec] = mu_s
        return (act, mu) if return_mu else act

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


def _secular_root(a, w, mask, lo_s, beta):
    """Root ``s > 0`` of ``beta * sum w / (s + a) = 1`` per row, given a lower bound ``lo_s``."""
    lo = np.log(lo_s)
    hi = np.log(beta * w.sum(axis=1))
    hi = np.maximum(hi, lo)
    u = lo.copy()
    done = hi - lo <= 4 * np.finfo(float).eps * np.maximum(1.0, np.abs(hi))
    log_beta = np.log(beta)
    for _ in range(MAX_ITER):
        if done.all():
            break
        s = np.exp(u)
        d = np.where(mask, s[:, None] + a, 1.0)
        r = np.where(mask, w / d, 0.0)
        phi = r.sum(axis=1)
        dphi = (r / d).sum(axis=1)
        f = np.log(phi) + log_beta
        fp = -s * dphi / phi
        lo = np.where(f > 0, u, lo)
        hi = np.where(f < 0, u, hi)
        with np.errstate(divide="ignore", invalid="ignore"):
            step = np.where(fp != 0, f / fp, 0.0)
        u_new = u - step
        out = ~((u_new > lo) & (u_new < hi))
        u_new = np.where(out & (f != 0), 0.5 * (lo + hi), u_new)
        u_new = np.where((f == 0) | done, u, u_new)
        small = np.abs(u_new - u) <= 4 * np.finfo(float).eps * np.maximum(1.0, np.abs(u))
        narrow = hi - lo <= 4 * np.finfo(float).eps * np.maximum(1.0, np.abs(hi))
        done = done | small | narrow | (f == 0)
        u = u_new
    return np.exp(u)


def fast_activation(w, x, beta: float, *, tie_rtol: float = TIE_RTOL) -> np.ndarray:
    """One-off convenience: canonical activation of ``W + beta x x^T`` via :class:`RankOneSolver`."""
    return RankOneSolver(w, tie_rtol=tie_rtol).activation(x, beta)
