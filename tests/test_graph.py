"""Co-occurrence graph, degree cap and spectrum diagnostics, checked against networkx and scipy."""

from __future__ import annotations

import itertools
import math
from datetime import datetime, timedelta, UTC

import networkx as nx
import numpy as np
import pytest
import scipy.linalg
import scipy.sparse as sp

from agent.graph import CooccurrenceGraph, episode_nodes, graph_summary
from agent.policy import DEFAULT_EMOTIONS, NODE_KINDS
from agent.spectrum import (dominance_ratio, eigenvalues, plot_spectra, spectral_flatness,
                            spectrum_report)


def demo_like_episodes(days=14, seed=0, n_places=10, p_missing_place=0.05):
    """A fortnight of hourly episodes with a home/work/café/evening routine.

    Mirrors the shape of the demo scenario (a few frequent places, sound classes
    tied to place types, mostly sedentary motion, a few moods per hour) without
    depending on the demo generator.
    """
    rng = np.random.default_rng(seed)
    start = datetime(2026, 11, 2, tzinfo=UTC)  # a Monday
    sound_of = {"P1": "S1", "P2": "S2", "P3": "S3", "P4": "S3", "P5": "S3"}
    out = []
    for h in range(days * 24):
        t = start + timedelta(hours=h)
        day, hour, wd = h // 24, t.hour, t.weekday()
        if hour < 8 or hour >= 22:
            place = "P1"
        elif wd < 5 and 9 <= hour < 17:
            place = "P2" if hour != 12 else f"P{3 + rng.integers(0, 3)}"
        else:
            place = f"P{rng.integers(1, n_places + 1)}"
        sound = sound_of.get(place, "S4")
        if rng.random() < 0.1:
            sound = f"S{rng.integers(1, 6)}"
        motion = "sedentary" if place in ("P1", "P2") else ["light", "mvpa", "sedentary"][rng.integers(0, 3)]
        k = rng.integers(0, 4)
        moods = sorted(rng.choice(DEFAULT_EMOTIONS, size=k, replace=False).tolist())
        if rng.random() < p_missing_place:
            place = None
        out.append({"key": t.isoformat(timespec="minutes"), "utc": t.timestamp(),
                    "date": t.date().isoformat(), "hour": hour, "weekday": wd, "week": day // 7 + 1,
                    "place": place, "sound": sound, "motion": motion, "moods": moods,
                    "coverage": {"gps_s": 3600.0, "audio_n": 6, "accel_s": 360.0, "mood": bool(k)}})
    return out


@pytest.fixture(scope="module")
def episodes():
    return demo_like_episodes()


@pytest.fixture(scope="module")
def graph5(episodes):
    """The graph under the default cap rule at cap 5, for the tests that only read it."""
    return CooccurrenceGraph.from_episodes(episodes, degree_cap=5)


def _nx_reference(episodes, kinds=NODE_KINDS):
    """Co-occurrence graph built independently with networkx (weights = counts)."""
    G = nx.Graph()
    for e in episodes:
        ns = episode_nodes(e, kinds)
        G.add_nodes_from(ns)
        for a, b in itertools.combinations(ns, 2):
            if G.has_edge(a, b):
                G[a][b]["weight"] += 1
            else:
                G.add_edge(a, b, weight=1)
    return G


def _nx_arrival(episodes, index, cap):
    """Arrival rule in plain Python: first co-occurrence in time order, pairs in index order."""
    G = nx.Graph()
    for e in sorted(episodes, key=lambda e: e["utc"]):
        ns = sorted(episode_nodes(e), key=index.__getitem__)
        G.add_nodes_from(ns)
        for a, b in itertools.combinations(ns, 2):
            if not G.has_edge(a, b) and G.degree(a) < cap and G.degree(b) < cap:
                G.add_edge(a, b)
    return G


def _to_nx(g, mat):
    G = nx.Graph()
    G.add_nodes_from(g.nodes)
    coo = sp.triu(mat, k=1).tocoo()
    for i, j, w in zip(coo.row, coo.col, coo.data, strict=True):
        G.add_edge(g.nodes[i], g.nodes[j], weight=float(w))
    return G


# -- structure against networkx ------------------------------------------------------

def test_counts_match_networkx_weights(episodes, graph5):
    # reference: networkx graph built from the same episodes
    g = graph5  # the default rule (bmatching) at cap 5, built once per module
    G = _nx_reference(episodes)
    assert set(g.nodes) == set(G.nodes)
    assert g.counts.nnz // 2 == G.number_of_edges()
    for a, b, w in G.edges(data="weight"):
        assert g.counts[g.index[a], g.index[b]] == w
    assert (g.counts != g.counts.T).nnz == 0
    assert g.counts.diagonal().sum() == 0


def test_uncapped_degrees_match_networkx(episodes, graph5):
    # reference: networkx degree of the co-occurrence graph
    g = graph5  # the default rule (bmatching) at cap 5, built once per module
    G = _nx_reference(episodes)
    deg = g.degrees("binary")
    for n, d in G.degree():
        assert deg[g.index[n]] == d


def test_components_match_networkx(episodes):
    # reference: networkx connected components, for the uncapped and the capped graph
    from scipy.sparse.csgraph import connected_components

    g = CooccurrenceGraph.from_episodes(episodes, degree_cap=3, cap_rule="arrival")
    n_unc, _ = connected_components(g.binary(), directed=False)
    assert n_unc == nx.number_connected_components(_nx_reference(episodes))
    n_cap, labels = connected_components(g.capped, directed=False)
    G = _nx_arrival(episodes, g.index, 3)
    assert n_cap == nx.number_connected_components(G)
    for comp in nx.connected_components(G):
        assert len({labels[g.index[n]] for n in comp}) == 1


@pytest.mark.parametrize("cap", [1, 2, 5, 9])
def test_arrival_rule_matches_independent_implementation(episodes, cap):
    # reference: the arrival rule re-implemented edge by edge on a networkx graph
    g = CooccurrenceGraph.from_episodes(episodes, degree_cap=cap, cap_rule="arrival")
    G = _nx_arrival(episodes, g.index, cap)
    ours = {frozenset(e) for e in _to_nx(g, g.capped).edges()}
    ref = {frozenset(e) for e in G.edges()}
    assert ours == ref
    assert g.n_edges == G.number_of_edges()


def test_arrival_rule_ignores_input_order(episodes):
    rng = np.random.default_rng(3)
    shuffled = [episodes[i] for i in rng.permutation(len(episodes))]
    a = CooccurrenceGraph.from_episodes(episodes, degree_cap=4, cap_rule="arrival")
    b = CooccurrenceGraph.from_episodes(shuffled, degree_cap=4, cap_rule="arrival")
    assert a.nodes == b.nodes
    assert (a.capped != b.capped).nnz == 0


def test_strongest_rule_matches_independent_implementation(episodes):
    # reference: greedy by count on the networkx weights, ties by first co-occurrence
    cap = 4
    g = CooccurrenceGraph.from_episodes(episodes, degree_cap=cap, cap_rule="strongest")
    G = _nx_reference(episodes)
    first = {}
    for t, e in enumerate(sorted(episodes, key=lambda e: e["utc"])):
        ns = sorted(episode_nodes(e), key=g.index.__getitem__)
        for a, b in itertools.combinations(ns, 2):
            first.setdefault(frozenset((a, b)), (t, g.index[a], g.index[b]))
    order = sorted(G.edges(data="weight"), key=lambda x: (-x[2], first[frozenset(x[:2])]))
    H = nx.Graph()
    H.add_nodes_from(G.nodes)
    for a, b, _w in order:
        if H.degree(a) < cap and H.degree(b) < cap:
            H.add_edge(a, b)
    assert {frozenset(e) for e in _to_nx(g, g.capped).edges()} == {frozenset(e) for e in H.edges()}


def test_strongest_rule_keeps_heavier_edges_than_arrival(episodes):
    a = CooccurrenceGraph.from_episodes(episodes, degree_cap=3, cap_rule="arrival")
    s = CooccurrenceGraph.from_episodes(episodes, degree_cap=3, cap_rule="strongest")
    wa = a.counts.multiply(a.capped).sum() / a.n_edges
    ws = s.counts.multiply(s.capped).sum() / s.n_edges
    assert ws > wa


@pytest.mark.parametrize("rule", ["arrival", "strongest"])
@pytest.mark.parametrize("cap", [1, 2, 3, 5, 8])
def test_no_node_above_the_cap(episodes, rule, cap):
    g = CooccurrenceGraph.from_episodes(episodes, degree_cap=cap, cap_rule=rule)
    deg = np.asarray(g.capped.sum(axis=1)).ravel()
    assert deg.max() <= cap
    assert set(np.unique(g.capped.data).tolist()) <= {1.0}
    assert (g.capped != g.capped.T).nnz == 0
    assert g.capped.diagonal().sum() == 0
    # every capped edge is a real co-occurrence
    assert (g.capped.multiply(g.counts > 0) != g.capped).nnz == 0


def test_large_cap_keeps_every_edge(episodes):
    g = CooccurrenceGraph.from_episodes(episodes, degree_cap=1000)
    assert (g.capped != g.binary()).nnz == 0


def test_from_episodes_reads_the_policy(episodes, default_policy):
    g = CooccurrenceGraph.from_episodes(episodes, default_policy)
    assert g.degree_cap == default_policy.graph.degree_cap == 5
    assert g.cap_rule == default_policy.graph.cap_rule
    assert g.capped.sum(axis=1).max() <= 5


def test_only_the_requested_kinds_become_nodes(episodes):
    g = CooccurrenceGraph.from_episodes(episodes, kinds=["hour", "weekday", "week", "place"])
    assert set(g.kinds.tolist()) == {"hour", "weekday", "week", "place"}


def test_episode_without_place_contributes_its_other_nodes():
    e = {"utc": 0.0, "key": "k", "hour": 3, "weekday": 2, "week": 1, "place": None, "sound": "S1",
         "motion": "light", "moods": ["calm"]}
    g = CooccurrenceGraph.from_episodes([e])
    assert ("place", "None") not in g.index
    assert len(g.nodes) == 6
    assert g.counts.nnz == 6 * 5  # a clique on the six nodes


def test_nodes_are_typed_strings_in_natural_order():
    eps = [{"utc": float(i), "hour": h, "weekday": 0, "week": 1, "place": p, "sound": None,
            "motion": None, "moods": []} for i, (h, p) in enumerate([(10, "P10"), (2, "P2"), (23, "P1")])]
    g = CooccurrenceGraph.from_episodes(eps)
    assert g.nodes == [("hour", "2"), ("hour", "10"), ("hour", "23"), ("weekday", "0"), ("week", "1"),
                       ("place", "P1"), ("place", "P2"), ("place", "P10")]
    assert all(isinstance(k, str) and isinstance(v, str) for k, v in g.nodes)


def test_bad_cap_rule_is_refused():
    with pytest.raises(ValueError, match="cap_rule"):
        CooccurrenceGraph.from_episodes([], cap_rule="newest")


def test_bad_degree_cap_is_refused():
    with pytest.raises(ValueError, match="degree_cap"):
        CooccurrenceGraph.from_episodes([], degree_cap=0)


def test_empty_episode_list_gives_an_empty_graph():
    g = CooccurrenceGraph.from_episodes([])
    assert g.n_nodes == 0 and g.n_edges == 0 and g.type_pairs == []


# -- W(theta), cue vector, summary --------------------------------------------------------

def test_weighted_puts_theta_on_capped_edges(episodes, graph5):
    g = graph5  # the default rule (bmatching) at cap 5, built once per module
    theta = {p: float(k + 1) for k, p in enumerate(g.type_pairs)}
    w = g.weighted(theta)
    assert (w != w.T).nnz == 0
    assert ((w != 0) != (g.capped != 0)).nnz == 0
    coo = sp.triu(w, 1).tocoo()
    for i, j, v in zip(coo.row, coo.col, coo.data, strict=True):
        assert v == theta[tuple(sorted((g.kinds[i], g.kinds[j])))]


def test_weighted_accepts_string_keys_in_either_order(episodes, graph5):
    g = graph5  # the default rule (bmatching) at cap 5, built once per module
    a, b = g.type_pairs[0]
    w1 = g.weighted({(a, b): 2.0})
    w2 = g.weighted({f"{b}|{a}": 2.0})
    assert (w1 != w2).nnz == 0
    assert w1.nnz > 0


def test_weighted_missing_pairs_weigh_zero(episodes, graph5):
    g = graph5  # the default rule (bmatching) at cap 5, built once per module
    assert g.weighted({}).sum() == 0


def test_weighted_refuses_unknown_kind(episodes, graph5):
    g = graph5  # the default rule (bmatching) at cap 5, built once per module
    with pytest.raises(ValueError, match="unknown node kind"):
        g.weighted({("hour", "colour"): 1.0})


def test_type_pairs_are_sorted_and_present(episodes, graph5):
    g = graph5  # the default rule (bmatching) at cap 5, built once per module
    assert g.type_pairs == sorted(g.type_pairs)
    assert all(tuple(sorted(p)) == p for p in g.type_pairs)
    assert ("hour", "place") in g.type_pairs


def test_cue_vector_is_unit_norm_on_time_nodes(episodes, graph5):
    g = graph5  # the default rule (bmatching) at cap 5, built once per module
    v = g.cue_vector(14, 2, 1)
    assert math.isclose(np.linalg.norm(v), 1.0)
    on = {g.nodes[i] for i in np.flatnonzero(v)}
    assert on == {("hour", "14"), ("weekday", "2"), ("week", "1")}


def test_cue_vector_skips_absent_nodes(episodes, graph5):
    g = graph5  # the default rule (bmatching) at cap 5, built once per module
    v = g.cue_vector(14, 2, 99)
    assert np.count_nonzero(v) == 2 and math.isclose(np.linalg.norm(v), 1.0)
    assert np.count_nonzero(g.cue_vector(None, None, 99)) == 0


def test_summary_is_consistent(episodes, graph5):
    g = graph5  # the default rule (bmatching) at cap 5, built once per module
    s = graph_summary(g)
    assert sum(s["nodes_per_kind"].values()) == s["n_nodes"] == g.n_nodes
    assert sum(s["degree_histogram"].values()) == g.n_nodes
    assert sum(s["edges_per_type_pair"].values()) == s["edges_capped"] == g.n_edges
    assert s["max_degree_capped"] <= 5
    assert s["edges_uncapped"] == _nx_reference(episodes).number_of_edges()


# -- spectrum ------------------------------------------------------------------------------

def test_eigenvalues_match_scipy_eigh(episodes, graph5):
    # reference: scipy.linalg.eigh on the dense matrix, and numpy's eigvalsh
    g = graph5  # the default rule (bmatching) at cap 5, built once per module
    for mat in (g.counts, g.binary(), g.capped):
        ours = eigenvalues(mat)
        ref = np.sort(scipy.linalg.eigh(mat.toarray(), eigvals_only=True))[::-1]
        assert np.allclose(ours, ref)
        assert np.allclose(ours, np.sort(np.linalg.eigvalsh(mat.toarray()))[::-1])


def test_eigenvalue_sums_match_trace_identities(episodes, graph5):
    # spectral graph theory: sum of eigenvalues = trace = 0; sum of squares = 2|E| for 0/1 adjacency
    g = graph5  # the default rule (bmatching) at cap 5, built once per module
    w = eigenvalues(g.capped)
    assert abs(w.sum()) < 1e-8
    assert math.isclose((w ** 2).sum(), 2 * g.n_edges, rel_tol=1e-9)


def test_capped_lambda1_is_bounded_by_the_cap(episodes, graph5):
    # lambda1 of an adjacency matrix lies between the mean and the maximum degree
    g = graph5  # the default rule (bmatching) at cap 5, built once per module
    w = eigenvalues(g.capped)
    deg = g.degrees("capped")
    assert deg.mean() - 1e-9 <= w[0] <= deg.max() + 1e-9 <= 5 + 1e-9


def test_leading_eigenvector_has_one_sign(episodes, graph5):
    # Perron-Frobenius: a connected nonnegative symmetric matrix has a positive leading eigenvector
    from scipy.sparse.csgraph import connected_components

    g = graph5  # the default rule (bmatching) at cap 5, built once per module
    for mat in (g.counts, g.capped):
        _, labels = connected_components(mat, directed=False)
        big = np.bincount(labels).argmax()
        idx = np.flatnonzero(labels == big)
        sub = mat[idx][:, idx].toarray()
        vals, vecs = scipy.linalg.eigh(sub)
        v = vecs[:, -1]
        v = v * np.sign(v.sum())
        assert (v > 0).all()


def test_flatness_of_a_flat_and_a_peaked_spectrum():
    assert math.isclose(spectral_flatness(np.ones(8)), 1.0)
    assert math.isclose(spectral_flatness(np.array([1.0, -1.0, 1.0, -1.0])), 1.0)
    assert spectral_flatness(np.array([5.0, 0.0, 0.0, 0.0])) == 0.0


def test_dominance_ratio_uses_magnitudes():
    assert math.isclose(dominance_ratio(np.array([4.0, 1.0, -2.0])), 2.0)
    assert math.isinf(dominance_ratio(np.array([3.0, 0.0, 0.0])))


def test_capped_spectrum_is_flatter_on_demo_like_episodes(episodes, default_policy):
    # the point of the cap: no hub swamps the leading eigenvector
    g = CooccurrenceGraph.from_episodes(episodes, default_policy)
    r = spectrum_report(g)
    flat = {k: round(r[k]["flatness"], 3) for k in r}
    ratio = {k: round(r[k]["ratio"], 2) for k in r}
    # measured on this fixture (seed 0): see docs/graph.md
    assert flat["capped"] > flat["binary"] > flat["counts"], flat
    assert ratio["capped"] < ratio["counts"], ratio
    assert flat["capped"] - flat["counts"] > 0.2, flat


def test_plot_writes_a_png(episodes, graph5, tmp_path):
    g = graph5  # the default rule (bmatching) at cap 5, built once per module
    out = tmp_path / "spectra.png"
    plot_spectra(spectrum_report(g), out)
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature, ISO/IEC 15948 section 5.2
