"""Retrieval solvers: fast secular solver vs scipy eigh / eigsh, power iteration, networkx.

Outside references: scipy.linalg.eigh (LAPACK), scipy.sparse.linalg.eigsh
(ARPACK), networkx.eigenvector_centrality_numpy on Zachary's karate club graph
(Zachary 1977, shipped with networkx).  The canonical choice for repeated
leading eigenvalues is our own convention (docs/model.md), so where it matters
the checks are against the eigenspace computed by eigh.
"""

import networkx as nx
import numpy as np
import pytest
import scipy.linalg as la
import scipy.sparse.linalg as spla
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from agent.model.design import ModelGraph, TrialDesign
from agent.model.retrieval import (dense_activation, eigsh_activation, power_activation,
                                   row_sum_bound)
from agent.model.secular import RankOneSolver, fast_activation

TOL = 1e-8


def unit(v):
    return v / np.linalg.norm(v)


def cue(n, idx):
    x = np.zeros(n)
    x[list(idx)] = 1.0
    return unit(x) if len(idx) else x


def orient(v, x):
    """Sign convention of the canonical activation: v.x > 0, or v.1 > 0 when v is orthogonal to x."""
    c = v @ x
    return v * (np.sign(c) if abs(c) > 1e-8 else np.sign(v.sum()))


def random_graph(rng, n, p, weighted=True):
    a = np.triu((rng.random((n, n)) < p).astype(float), 1)
    if weighted:
        a *= rng.uniform(0.1, 3.0, size=(n, n))
    return a + a.T


# ----------------------------------------------------------------------- outside references
def test_beta_zero_matches_networkx_eigenvector_centrality_on_karate_club():
    # Zachary (1977) karate club, as shipped by networkx; centrality up to scale
    g = nx.karate_club_graph()
    ref = nx.eigenvector_centrality_numpy(g)
    mg = ModelGraph.from_networkx(g, weight=None)
    labels = [lab for _, lab in sorted(mg.index, key=mg.index.get)]
    want = unit(np.array([ref[int(lab)] for lab in labels]))
    w = mg.dense_w(np.ones(len(mg.type_pairs)))
    x = cue(mg.n, [0, 33])
    for v in (fast_activation(w, x, 0.0), dense_activation(w, x, 0.0)[0],
              power_activation(w, x, 0.0).v, eigsh_activation(w, x, 0.0)[0]):
        np.testing.assert_allclose(v, want, atol=TOL)


def test_secular_root_equals_dense_leading_eigenvalue():
    # reference: scipy.linalg.eigvalsh of W + beta x x^T
    rng = np.random.default_rng(1)
    for _ in range(20):
        n = int(rng.integers(4, 40))
        w = random_graph(rng, n, 0.3)
        x = cue(n, rng.choice(n, 3, replace=False))
        beta = float(10 ** rng.uniform(-3, 2))
        mu = RankOneSolver(w).leading_eigenvalue(x, beta)
        ref = la.eigvalsh(w + beta * np.outer(x, x))[-1]
        assert abs(mu - ref) <= 1e-10 * max(1.0, abs(ref))


def test_fast_matches_eigh_and_eigsh_on_random_graphs():
    rng = np.random.default_rng(2)
    for _ in range(40):
        n = int(rng.integers(5, 60))
        w = random_graph(rng, n, float(rng.uniform(0.05, 0.5)))
        x = cue(n, rng.choice(n, int(rng.integers(1, 4)), replace=False))
        beta = float(10 ** rng.uniform(-4, 2))
        m = w + beta * np.outer(x, x)
        ev, evec = la.eigh(m)
        assume_gap = ev[-1] - ev[-2]
        if assume_gap < 1e-6:
            continue
        ref = orient(evec[:, -1], x)
        np.testing.assert_allclose(fast_activation(w, x, beta), ref, atol=TOL)
        # scipy.sparse.linalg.eigsh directly, independent of our wrapper
        vals, vecs = spla.eigsh(m, k=1, which="LA", tol=0)
        v = orient(vecs[:, 0], x)
        np.testing.assert_allclose(fast_activation(w, x, beta), v, atol=TOL)
        np.testing.assert_allclose(eigsh_activation(w, x, beta)[0], ref, atol=TOL)
        np.testing.assert_allclose(power_activation(w, x, beta).v, ref, atol=1e-7)


def test_activation_is_nonnegative():
    rng = np.random.default_rng(3)
    w = random_graph(rng, 30, 0.2)
    v = fast_activation(w, cue(30, [0, 1, 2]), 2.0)
    assert v.min() > -1e-12
    assert abs(np.linalg.norm(v) - 1) < 1e-12


# ----------------------------------------------------------------------- power iteration
def bipartite_with_cue():
    # complete bipartite K(4, 6) is exactly bipartite: lambda_min = -lambda_max;
    # a weak cue on one side tips it only slightly, so the graph stays near-bipartite
    g = nx.complete_bipartite_graph(4, 6)
    w = nx.to_numpy_array(g)
    x = cue(10, [0])
    return w, x, 1e-3


def test_plain_power_iteration_fails_on_near_bipartite_graph():
    w, x, beta = bipartite_with_cue()
    ev = la.eigvalsh(w + beta * np.outer(x, x))
    assert abs(ev[0]) > 0.999 * ev[-1]  # largest magnitudes nearly tie (the premise)
    res = power_activation(w, x, beta, shift=0.0, max_iter=2000, canonical=False)
    assert not res.converged


def test_shifted_power_iteration_converges_on_near_bipartite_graph():
    w, x, beta = bipartite_with_cue()
    res = power_activation(w, x, beta)
    assert res.converged
    ref = dense_activation(w, x, beta)[0]
    np.testing.assert_allclose(res.v, ref, atol=1e-8)


def test_row_sum_bound_makes_shifted_matrix_psd():
    rng = np.random.default_rng(4)
    w = random_graph(rng, 25, 0.3)
    x = cue(25, [1, 2])
    s = row_sum_bound(w, x, 3.0)
    assert la.eigvalsh(w + 3.0 * np.outer(x, x) + s * np.eye(25))[0] >= -1e-10


# ----------------------------------------------------------------------- degenerate cases
def two_components(strong_first=True):
    # a 5-clique and a 4-path, disjoint; the clique's eigenvalue 4 dominates
    clique = nx.complete_graph(5)
    path = nx.path_graph(4)
    g = nx.disjoint_union(clique, path) if strong_first else nx.disjoint_union(path, clique)
    return nx.to_numpy_array(g)


def all_solvers(w, x, beta):
    return {"fast": fast_activation(w, x, beta), "dense": dense_activation(w, x, beta)[0],
            "power": power_activation(w, x, beta).v, "eigsh": eigsh_activation(w, x, beta)[0]}


def assert_all_equal(w, x, beta, want):
    for name, v in all_solvers(w, x, beta).items():
        np.testing.assert_allclose(v, want, atol=TOL, err_msg=name)


def test_cue_on_weak_component_small_beta_keeps_strong_component():
    # deflation: the cue has no projection on the leading eigenspace (the clique)
    w = two_components()
    x = cue(9, [6])  # on the path
    want = np.zeros(9)
    want[:5] = 1 / np.sqrt(5)  # Perron vector of K5, eigenvalue 4
    assert_all_equal(w, x, 0.5, want)


def test_cue_on_weak_component_large_beta_moves_to_cued_component():
    w = two_components()
    x = cue(9, [6])
    beta = 10.0  # mu* on the path exceeds 4
    ev, evec = la.eigh(w + beta * np.outer(x, x))
    ref = evec[:, -1] * np.sign(evec[:, -1] @ x)
    assert np.allclose(ref[:5], 0)
    assert_all_equal(w, x, beta, ref)


def test_equal_components_beta_zero_projects_cue():
    # two identical triangles: lambda_max = 2 twice; beta = 0 takes P_E x
    g = nx.disjoint_union(nx.complete_graph(3), nx.complete_graph(3))
    w = nx.to_numpy_array(g)
    x = cue(6, [4])
    want = np.r_[np.zeros(3), np.ones(3) / np.sqrt(3)]
    assert_all_equal(w, x, 0.0, want)


def test_equal_components_empty_cue_takes_ones_projection():
    g = nx.disjoint_union(nx.complete_graph(3), nx.complete_graph(3))
    w = nx.to_numpy_array(g)
    x = np.zeros(6)
    want = np.ones(6) / np.sqrt(6)
    assert_all_equal(w, x, 2.0, want)


def test_equal_components_cue_with_positive_beta():
    g = nx.disjoint_union(nx.complete_graph(3), nx.complete_graph(3))
    w = nx.to_numpy_array(g)
    x = cue(6, [0, 1])
    ev, evec = la.eigh(w + 0.7 * np.outer(x, x))
    assert ev[-1] - ev[-2] > 1e-3
    ref = evec[:, -1] * np.sign(evec[:, -1] @ x)
    assert_all_equal(w, x, 0.7, ref)


def test_no_edges_beta_zero_returns_cue():
    w = np.zeros((5, 5))
    x = cue(5, [1, 3])
    assert_all_equal(w, x, 0.0, x)


def test_no_edges_positive_beta_returns_cue():
    w = np.zeros((5, 5))
    x = cue(5, [2])
    assert_all_equal(w, x, 1.0, x)


def test_cue_on_isolated_node_with_large_beta():
    w = two_components()
    w = np.pad(w, ((0, 1), (0, 1)))  # node 9 isolated
    x = cue(10, [9])
    want = np.zeros(10)
    want[9] = 1.0  # eigenvalue beta = 6 > 4
    assert_all_equal(w, x, 6.0, want)


def test_cue_on_isolated_node_with_small_beta():
    w = np.pad(two_components(), ((0, 1), (0, 1)))
    x = cue(10, [9])
    want = np.zeros(10)
    want[:5] = 1 / np.sqrt(5)
    assert_all_equal(w, x, 1.0, want)


def test_complete_graph_with_repeated_interior_eigenvalue():
    # K8: eigenvalue -1 has multiplicity 7; the update must sum those weights
    w = nx.to_numpy_array(nx.complete_graph(8))
    x = cue(8, [0, 1, 2])
    ev, evec = la.eigh(w + 3.0 * np.outer(x, x))
    ref = evec[:, -1] * np.sign(evec[:, -1] @ x)
    assert_all_equal(w, x, 3.0, ref)


@pytest.mark.parametrize("beta", [1e-12, 1e-6, 1e6])
def test_extreme_beta(beta):
    rng = np.random.default_rng(5)
    w = random_graph(rng, 20, 0.3)
    x = cue(20, [0, 5])
    ev, evec = la.eigh(w + beta * np.outer(x, x))
    ref = evec[:, -1] * np.sign(evec[:, -1] @ x)
    np.testing.assert_allclose(fast_activation(w, x, beta), ref, atol=TOL)


def test_tiny_projection_on_leading_eigenvector():
    # cue almost orthogonal to the Perron vector: the root sits just above lambda_max
    w = two_components()
    x = np.zeros(9)
    x[6] = 1.0
    x[0] = 1e-7
    x = unit(x)
    ev, evec = la.eigh(w + 0.5 * np.outer(x, x))
    ref = evec[:, -1] * np.sign(evec[:, -1] @ x)
    np.testing.assert_allclose(fast_activation(w, x, 0.5), ref, atol=TOL)


def test_rejects_negative_beta():
    with pytest.raises(ValueError, match="beta"):
        fast_activation(np.zeros((3, 3)), np.ones(3) / np.sqrt(3), -1.0)


def test_dense_rejects_wrong_cue_length():
    with pytest.raises(ValueError, match="length 3"):
        dense_activation(np.zeros((3, 3)), np.ones(4), 1.0)


# ----------------------------------------------------------------------- vectorised trials
def typed_graph(rng, n_places=8):
    """A small demo-like typed graph: hours, weekdays, weeks, places, sounds."""
    nodes = ([("hour", str(h)) for h in range(24)] + [("weekday", str(d)) for d in range(7)]
             + [("week", "1"), ("week", "2")] + [("place", f"P{i}") for i in range(n_places)]
             + [("sound", f"S{i}") for i in range(4)])
    n = len(nodes)
    index = {v: i for i, v in enumerate(nodes)}
    kinds = [k for k, _ in nodes]
    a = np.zeros((n, n))
    for _ in range(300):
        h, d, wk = rng.integers(24), rng.integers(7), rng.integers(1, 3)
        p, s = rng.integers(n_places), rng.integers(4)
        ids = [index[("hour", str(h))], index[("weekday", str(d))], index[("week", str(wk))],
               index[("place", f"P{p}")], index[("sound", f"S{s}")]]
        for i in ids:
            for j in ids:
                if i != j:
                    a[i, j] = 1.0
    return ModelGraph(a, kinds, index)


def random_trials(rng, n_trials, n_places=8, m=4):
    out = []
    for t in range(n_trials):
        opts = [f"P{i}" for i in rng.choice(n_places, m, replace=False)]
        out.append({"trial_id": f"t{t}", "date": f"2026-11-{1 + t % 9:02d}", "hour": int(rng.integers(24)),
                    "weekday": int(rng.integers(7)), "week": int(rng.integers(1, 4)),
                    "options": opts, "correct": opts[0], "choice": opts[int(rng.integers(m))]})
    return out


def test_vectorised_solve_matches_dense_per_trial_on_typed_graph():
    rng = np.random.default_rng(6)
    g = typed_graph(rng)
    d = TrialDesign(g, random_trials(rng, 60))
    theta = rng.uniform(0.2, 2.0, len(g.type_pairs))
    w = g.dense_w(theta)
    solver = RankOneSolver(w)
    for beta in (0.0, 0.3, 5.0):
        act = solver.solve(d.cue_idx, d.cue_w, beta, d.opt_idx)
        for t in range(len(d)):
            v = dense_activation(w, d.cue_vector(t), beta)[0]
            np.testing.assert_allclose(act[t], np.append(v, 0.0)[d.opt_idx[t]], atol=TOL)


def test_absent_option_gets_zero_activation():
    rng = np.random.default_rng(7)
    g = typed_graph(rng)
    trials = random_trials(rng, 3)
    trials[0]["options"][1] = "P99"
    d = TrialDesign(g, trials)
    act = RankOneSolver(g.dense_w(np.ones(len(g.type_pairs)))).solve(d.cue_idx, d.cue_w, 1.0, d.opt_idx)
    assert act[0, 1] == 0.0
    assert d.missing_options == 1


# ----------------------------------------------------------------------- property tests
@st.composite
def graphs_and_cues(draw):
    n = draw(st.integers(2, 14))
    edges = draw(st.lists(st.tuples(st.integers(0, n - 1), st.integers(0, n - 1),
                                    st.sampled_from([0.5, 1.0, 2.0, 3.0])), max_size=40))
    w = np.zeros((n, n))
    for i, j, val in edges:
        if i != j:
            w[i, j] = w[j, i] = val
    k = draw(st.integers(0, min(3, n)))
    idx = draw(st.lists(st.integers(0, n - 1), min_size=k, max_size=k, unique=True))
    beta = draw(st.sampled_from([0.0, 1e-3, 0.5, 1.0, 2.5, 40.0]))
    return w, cue(n, idx), beta


def well_posed(w, x, beta):
    """True unless the top two eigenvalues nearly tie without being equal (ill-conditioned)."""
    ev = la.eigvalsh(w + beta * np.outer(x, x))
    if len(ev) < 2:
        return True
    gaps = np.diff(ev)
    return not np.any((gaps > 1e-10 * max(1, abs(ev).max())) & (gaps < 1e-5))


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(graphs_and_cues())
def test_property_fast_equals_dense(case):
    w, x, beta = case
    assume(well_posed(w, x, beta))
    np.testing.assert_allclose(fast_activation(w, x, beta), dense_activation(w, x, beta)[0], atol=TOL)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(graphs_and_cues())
def test_property_eigsh_and_power_equal_dense(case):
    w, x, beta = case
    assume(well_posed(w, x, beta))
    ref = dense_activation(w, x, beta)[0]
    np.testing.assert_allclose(eigsh_activation(w, x, beta)[0], ref, atol=TOL)
    np.testing.assert_allclose(power_activation(w, x, beta).v, ref, atol=1e-7)


@settings(max_examples=100, deadline=None)
@given(graphs_and_cues())
def test_property_secular_root_is_leading_eigenvalue(case):
    w, x, beta = case
    mu = RankOneSolver(w).leading_eigenvalue(x, beta)
    ref = la.eigvalsh(w + beta * np.outer(x, x))[-1]
    assert abs(mu - ref) <= 1e-9 * max(1.0, abs(ref))
