"""Reference solvers for the cue-biased leading eigenvector.

For one trial the activation is the eigenvector of ``M = W + beta * x x^T`` for
its largest algebraic eigenvalue, with unit Euclidean norm and the sign that
makes it nonnegative.  Three reference solvers compute it independently:

``dense_activation``
    ``scipy.linalg.eigh`` of the full matrix (O(n^3) per trial).
``power_activation``
    power iteration on ``M + s I``.  The shift is needed because for a
    nonnegative symmetric matrix Perron-Frobenius only guarantees
    ``lambda_max >= |lambda_min|``: on a bipartite graph the two are equal and
    on a near-bipartite one (time and place nodes linked mostly to each other)
    they are nearly equal, so plain iteration alternates between two vectors
    and converges at the rate ``|lambda_min| / lambda_max``, i.e. not at all.
    With ``s`` at least ``|lambda_min|`` (the maximum row sum bounds it), ``M + s I``
    is positive semidefinite, its dominant eigenvalue is the leading algebraic
    one of ``M`` and the iterates converge monotonically.
``eigsh_activation``
    ``scipy.sparse.linalg.eigsh(which="LA")`` on ``W`` plus the rank-one term
    as a linear operator.

The leading eigenvector is not unique when the largest eigenvalue is repeated
(a disconnected graph with two equally strong components, ``beta = 0``, an
empty cue).  All solvers, and the fast one in :mod:`.secular`, return the same
deterministic choice, the *canonical activation*:

    let E be the eigenspace of the largest eigenvalue; the activation is
    ``P_E x / |P_E x|`` if the cue has a projection on E (for ``beta -> 0+``
    this is the limit of the cue-biased vector), otherwise ``P_E 1 / |P_E 1|``
    (never zero: E holds a nonnegative Perron vector).

Power iteration and Lanczos started from ``x`` converge to exactly ``P_E x``
(components inside E grow at the same rate), which is why they can honour the
rule by running from ``x`` and, only to certify, from ``1``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg as la
import scipy.sparse as sp
import scipy.sparse.linalg as spla

# Eigenvalues closer than TIE_RTOL times the spectral scale are one eigenvalue.
TIE_RTOL = 1e-10
# A cue whose squared projection on an eigenspace is below ZERO_RTOL * |x|^2 has
# none (rounding leaves about n * eps there, far below this).
ZERO_RTOL = 1e-20


def _as_dense(w) -> np.ndarray:
    return w.toarray() if sp.issparse(w) else np.asarray(w, dtype=np.float64)


def _check(w, x, beta):
    n = w.shape[0]
    if w.shape != (n, n):
        raise ValueError(f"W: expected a square matrix, got shape {w.shape}")
    x = np.asarray(x, dtype=np.float64).ravel()
    if x.shape != (n,):
        raise ValueError(f"cue x: expected length {n}, got {x.shape[0]}")
    beta = float(beta)
    if not np.isfinite(beta) or beta < 0:
        raise ValueError(f"beta = {beta!r}: expected a finite number >= 0")
    return x, beta


def canonical_from_eigenspace(q: np.ndarray, x: np.ndarray) -> np.ndarray:
    """The canonical activation from an orthonormal basis ``q`` (n, k) of E."""
    n = q.shape[0]
    x2 = float(x @ x)
    c = q.T @ x
    v = q @ c if x2 > 0 and float(c @ c) > ZERO_RTOL * x2 else q @ (q.T @ np.ones(n))
    return v / np.linalg.norm(v)


def top_cluster(evals: np.ndarray, scale: float, tie_rtol: float = TIE_RTOL) -> int:
    """How many of the ascending ``evals`` tie with the largest (chained within tolerance)."""
    tol = tie_rtol * scale
    k = 1
    while k < len(evals) and evals[-k] - evals[-k - 1] <= tol:
        k += 1
    return k


def dense_activation(w, x, beta: float, *, tie_rtol: float = TIE_RTOL):
    """Canonical activation of ``W + beta x x^T`` by a full ``scipy.linalg.eigh``.

    Returns
    -------
    v : (n,) ndarray
        Unit-norm activation, nonnegative (up to rounding).
    mu : float
        The largest eigenvalue.
    """
    wd = _as_dense(w)
    x, beta = _check(wd, x, beta)
    if wd.shape[0] == 0:
        return np.zeros(0), float("nan")
    m = wd + beta * np.outer(x, x)
    evals, evecs = la.eigh(m)
    scale = max(np.abs(evals).max(), np.finfo(float).tiny)
    k = top_cluster(evals, scale, tie_rtol)
    return canonical_from_eigenspace(evecs[:, -k:], x), float(evals[-1])


def _operator(w, x, beta):
    ws = sp.csr_matrix(w) if not sp.issparse(w) else w.tocsr()

    def mv(v):
        v = np.asarray(v).ravel()
        return ws @ v + beta * x * float(x @ v)

    return ws, mv


@dataclass
class PowerResult:
    """Outcome of :func:`power_activation`."""

    v: np.ndarray
    mu: float
    n_iter: int
    converged: bool
    shift: float


def row_sum_bound(w, x, beta) -> float:
    """An upper bound on the spectral radius of ``W + beta x x^T`` (max absolute row sum)."""
    ws = sp.csr_matrix(abs(w)) if sp.issparse(w) else sp.csr_matrix(np.abs(w))
    rows = np.asarray(ws.sum(axis=1)).ravel()
    ax = np.abs(x)
    return float((rows + beta * ax * ax.sum()).max()) if len(rows) else 0.0


def _power_run(mv, v0, shift, tol, max_iter, scale):
    v = v0 / np.linalg.norm(v0)
    mu = float("nan")
    for it in range(1, max_iter + 1):
        mvv = mv(v)
        mu = float(v @ mvv)
        resid = np.linalg.norm(mvv - mu * v)
        if resid <= tol * scale:
            return v, mu, it, True
        y = mvv + shift * v
        ny = np.linalg.norm(y)
        if ny == 0:
            return v, mu, it, False
        v = y / ny
    return v, mu, max_iter, False


def power_activation(w, x, beta: float, *, shift: float | None = None, tol: float = 1e-12,
                     max_iter: int = 200_000, canonical: bool = True,
                     tie_rtol: float = TIE_RTOL) -> PowerResult:
    """Canonical activation by shifted power iteration on ``W + beta x x^T + s I``.

    Parameters
    ----------
    shift : float, optional
        ``s``; defaults to :func:`row_sum_bound`, which makes the shifted matrix
        positive semidefinite.  ``shift=0`` is plain power iteration (it fails to
        converge on bipartite and near-bipartite graphs; see the module text).
    tol : float
        Stop when the residual ``|M v - mu v|`` is below ``tol`` times the row-sum bound.
    canonical : bool
        Also run from the all-ones vector and keep the run from the cue only if
        it reached the top eigenvalue (needed for the degenerate cases); with
        False a single run from the cue is made (what the benchmark times).
    """
    x, beta = _check(w, x, beta)
    n = w.shape[0]
    if n == 0:
        return PowerResult(np.zeros(0), float("nan"), 0, True, 0.0)
    _, mv = _operator(w, x, beta)
    bound = row_sum_bound(w, x, beta)
    s = bound if shift is None else float(shift)
    scale = max(bound, np.finfo(float).tiny)
    x2 = float(x @ x)
    runs = []
    if x2 > 0:
        runs.append(("x",) + _power_run(mv, x.copy(), s, tol, max_iter, scale))
    if canonical or x2 == 0:
        runs.append(("1",) + _power_run(mv, np.ones(n), s, tol, max_iter, scale))
    pick = runs[-1]
    if runs[0][0] == "x":
        _, vx, mux, _, _ = runs[0]
        proj2 = float(vx @ x) ** 2
        reached = len(runs) == 1 or mux >= runs[-1][2] - tie_rtol * scale
        if reached and proj2 > ZERO_RTOL * x2:
            pick = runs[0]
    kind, v, mu, _, _ = pick
    ref = x if kind == "x" else np.ones(n)
    if float(v @ ref) < 0:
        v = -v
    n_iter = sum(r[3] for r in runs)
    converged = all(r[4] for r in runs)
    return PowerResult(v, mu, n_iter, converged, s)


def eigsh_activation(w, x, beta: float, *, tol: float = 0.0, canonical: bool = True,
                     tie_rtol: float = TIE_RTOL):
    """Canonical activation by ``scipy.sparse.linalg.eigsh(which="LA")``.

    With ``canonical`` the top eigenvalues are computed in blocks of growing
    ``k`` until the cluster tying with the largest one is closed, and the
    canonical rule is applied to that eigenspace.  ARPACK restarts from a fresh
    vector when a Krylov space becomes invariant, so it finds every component's
    Perron vector of a disconnected graph; within a connected graph the top
    eigenvalue is simple (Perron-Frobenius), so nothing else can repeat.  With
    ``canonical=False`` one pair is computed from ``v0 = x`` (what the benchmark
    times).  Matrices smaller than 3 are solved densely (ARPACK needs ``k < n``).
    """
    x, beta = _check(w, x, beta)
    n = w.shape[0]
    if n < 3:
        return dense_activation(w, x, beta, tie_rtol=tie_rtol)
    _, mv = _operator(w, x, beta)
    op = spla.LinearOperator((n, n), matvec=mv, dtype=np.float64)
    if not canonical:
        v0 = x.copy() if float(x @ x) > 0 else np.ones(n)
        vals, vecs = spla.eigsh(op, k=1, which="LA", v0=v0, tol=tol)
        v = vecs[:, 0]
        return (v if v @ v0 >= 0 else -v), float(vals[0])
    k = min(2, n - 1)
    while True:
        try:
            vals, vecs = spla.eigsh(op, k=k, which="LA", v0=np.ones(n), tol=tol)
        except spla.ArpackError:
            return dense_activation(w, x, beta, tie_rtol=tie_rtol)
        order = np.argsort(vals)
        vals, vecs = vals[order], vecs[:, order]
        scale = max(np.abs(vals).max(), np.finfo(float).tiny)
        c = top_cluster(vals, scale, tie_rtol)
        if c < k:
            return canonical_from_eigenspace(vecs[:, -c:], x), float(vals[-1])
        if k == n - 1:
            return dense_activation(w, x, beta, tie_rtol=tie_rtol)
        k = min(2 * k, n - 1)
