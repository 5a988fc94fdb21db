"""Typed co-occurrence graph of hourly episodes, with a degree cap and W(θ).

Terminology (see ``docs/graph.md``):

node
    A pair ``(kind, label)`` with both parts strings, e.g. ``("hour", "14")``,
    ``("place", "P3")``, ``("mood", "calm")``.  Only the kinds listed in
    ``policy.graph.nodes`` are used.
co-occurrence
    Two nodes present in the same episode co-occur once for that episode.
counts
    The symmetric matrix of co-occurrence counts (zero diagonal), no cap.
degree cap
    No node keeps more than ``m = policy.graph.degree_cap`` edges.  Which edges
    survive is the cap rule (``policy.graph.cap_rule``), one of the rules of
    :mod:`agent.caps`: ``"strongest"``, ``"arrival"``, ``"mutual"``,
    ``"bmatching"``, ``"quota"``, ``"routine"``.  The first co-occurrence order ("arrival") is
    episodes in time order (``utc``), and within an episode the node pairs in
    index order.
edge weights
    Kept links weigh 1 (``"binary"``) or ``1 + ln(count)`` (``"log_count"``),
    ``policy.graph.edge_weight``.

Everything is :mod:`scipy.sparse`; construction is vectorised with numpy except
for the greedy caps, which loop once over the distinct pairs.
"""

from __future__ import annotations

from typing import Any

import re
from collections.abc import Iterable, Mapping, Sequence

import numpy as np
import scipy.sparse as sp

from . import caps
from .caps import CAP_RULES, EDGE_WEIGHTS, greedy_degree_cap  # noqa: F401  (re-exported)
from .policy import NODE_KINDS

TIME_KINDS = ("hour", "weekday", "week")
DEFAULT_CAP_RULE = "bmatching"


def label_key(label: str):
    """Natural order: numbers numerically, ``P2`` before ``P10``."""
    parts = re.split(r"(\d+)", label)
    return tuple((0, int(p), "") if p.isdigit() else (1, 0, p) for p in parts if p != "")


def episode_nodes(episode: Mapping, kinds: Sequence[str] = NODE_KINDS) -> list[tuple[str, str]]:
    """The nodes an episode contributes, restricted to ``kinds``.

    ``place``, ``sound`` and ``motion`` equal to ``None`` contribute nothing (an
    hour without location data still links its time, sound, motion and moods).
    """
    out: list[tuple[str, str]] = []
    for kind in kinds:
        if kind == "mood":
            for m in episode.get("moods") or ():
                out.append(("mood", str(m)))
            continue
        value = episode.get(kind)
        if value is None:
            continue
        out.append((kind, str(value)))
    return list(dict.fromkeys(out))  # de-duplicate, keep order


def _theta_key(key) -> tuple[str, str]:
    if isinstance(key, str):
        parts = key.split("|")
        if len(parts) != 2:
            raise ValueError(f"theta key {key!r}: expected 'kind|kind' such as 'hour|place'")
        return tuple(sorted(parts))  # type: ignore[return-value]
    a, b = key
    return tuple(sorted((str(a), str(b))))  # type: ignore[return-value]


class CooccurrenceGraph:
    """Typed co-occurrence graph.  Build with :meth:`from_episodes`.

    Attributes
    ----------
    nodes : list of (kind, label)
        Ordered by kind (policy order) and then by natural label order.
    index : dict
        Node to row/column index.
    kinds : ndarray of str
        Kind of each node.
    counts : scipy.sparse.csr_matrix
        Symmetric co-occurrence counts (float64, zero diagonal), no cap.
    capped : scipy.sparse.csr_matrix
        Symmetric 0/1 adjacency after the degree cap.
    type_pairs : list of (str, str)
        Kind pairs (each pair alphabetically sorted, list sorted) with at least
        one capped edge.
    weights : scipy.sparse.csr_matrix
        The capped links with their weights (``edge_weight``): 1, or ``1 + ln(count)``.
    degree_cap, cap_rule, edge_weight : int, str, str
    cap_info : dict
        What the cap rule reports (``{"rule", "method"}`` for b-matching: ``"milp"``
        or the ``"greedy"`` fallback; ``"quota"`` for quotas).
    n_episodes : int
    """

    def __init__(self, nodes, counts, capped, degree_cap, cap_rule, n_episodes, *,
                 edge_weight: str = "binary", cap_info: dict | None = None):
        self.nodes = list(nodes)
        self.index = {n: i for i, n in enumerate(self.nodes)}
        self.kinds = np.array([k for k, _ in self.nodes], dtype=str)
        self.counts = counts.tocsr()
        self.capped = capped.tocsr()
        self.degree_cap = int(degree_cap)
        self.cap_rule = cap_rule
        self.n_episodes = int(n_episodes)
        self.edge_weight = edge_weight
        self.cap_info = dict(cap_info or {"rule": cap_rule})
        w = self.capped.multiply(self.counts).tocsr()
        w.data = caps.edge_weights(w.data, edge_weight)
        self.weights = w
        upper = sp.triu(self.capped, k=1).tocoo()
        self._edge_rows = upper.row.astype(np.int64)
        self._edge_cols = upper.col.astype(np.int64)
        pairs = [tuple(sorted((self.kinds[i], self.kinds[j])))
                 for i, j in zip(self._edge_rows.tolist(), self._edge_cols.tolist(), strict=False)]
        self.type_pairs = sorted(set(pairs))
        pid = {p: k for k, p in enumerate(self.type_pairs)}
        self._edge_pair = np.array([pid[p] for p in pairs], dtype=np.int64)
        self._edge_w = (np.asarray(self.weights[self._edge_rows, self._edge_cols]).ravel()
                        if len(self._edge_rows) else np.zeros(0))

    # -- construction ------------------------------------------------------
    @classmethod
    def from_episodes(cls, episodes: Iterable[Mapping], policy=None, *, kinds=None,
                      degree_cap=None, cap_rule=None, edge_weight=None,
                      quota=None) -> CooccurrenceGraph:
        """Build the graph from episode records (``docs/architecture.md``, Episodes).

        Parameters
        ----------
        episodes : iterable of dict
            Episode records; order does not matter (they are sorted by ``utc``).
        policy : Policy, optional
            Supplies ``graph.nodes``, ``graph.degree_cap``, ``graph.cap_rule``,
            ``graph.edge_weight`` and ``graph.type_quota``; keyword arguments
            override it.
        """
        if policy is not None:
            gp = policy.graph
            kinds = kinds if kinds is not None else list(gp.nodes)
            degree_cap = degree_cap if degree_cap is not None else gp.degree_cap
            cap_rule = cap_rule if cap_rule is not None else gp.cap_rule
            edge_weight = edge_weight if edge_weight is not None else getattr(gp, "edge_weight", None)
            quota = quota if quota is not None else getattr(gp, "type_quota", None)
        kinds = list(kinds) if kinds is not None else list(NODE_KINDS)
        degree_cap = 5 if degree_cap is None else degree_cap
        cap_rule = DEFAULT_CAP_RULE if cap_rule is None else cap_rule  # as the policy schema
        edge_weight = "binary" if edge_weight is None else edge_weight
        quota = caps.DEFAULT_QUOTA if quota is None else quota
        if edge_weight not in EDGE_WEIGHTS:
            raise ValueError(f"edge_weight {edge_weight!r}: expected one of {list(EDGE_WEIGHTS)}")
        bad = [k for k in kinds if k not in NODE_KINDS]
        if bad:
            raise ValueError(f"unknown node kinds {bad}; expected a subset of {list(NODE_KINDS)}")
        if cap_rule not in CAP_RULES:
            raise ValueError(f"cap_rule {cap_rule!r}: expected one of {list(CAP_RULES)}")
        if not isinstance(degree_cap, (int, np.integer)) or degree_cap < 1:
            raise ValueError(f"degree_cap {degree_cap!r}: expected a positive integer")

        eps = sorted(episodes, key=lambda e: (float(e["utc"]), str(e.get("key", ""))))
        per_episode = [episode_nodes(e, kinds) for e in eps]
        kind_rank = {k: r for r, k in enumerate(kinds)}
        node_set = {n for ns in per_episode for n in ns}
        nodes = sorted(node_set, key=lambda n: (kind_rank[n[0]], label_key(n[1])))
        index = {n: i for i, n in enumerate(nodes)}
        n_nodes, n_eps = len(nodes), len(eps)

        width = max((len(ns) for ns in per_episode), default=0)
        m = np.full((n_eps, max(width, 1)), -1, dtype=np.int64)
        for e, ns in enumerate(per_episode):
            idx = sorted(index[n] for n in ns)
            m[e, : len(idx)] = idx

        # every unordered pair of nodes within an episode, with its episode
        lo_parts, hi_parts, ep_parts = [], [], []
        ep_ids = np.arange(n_eps, dtype=np.int64)
        for a in range(width):
            for b in range(a + 1, width):
                ok = m[:, b] >= 0  # rows are sorted and padded at the end
                lo_parts.append(m[ok, a])
                hi_parts.append(m[ok, b])
                ep_parts.append(ep_ids[ok])
        if lo_parts:
            lo = np.concatenate(lo_parts)
            hi = np.concatenate(hi_parts)
            ep = np.concatenate(ep_parts)
        else:
            lo = hi = ep = np.zeros(0, dtype=np.int64)
        order = np.lexsort((hi, lo, ep))  # time order, then pair order within the episode
        key = lo[order] * max(n_nodes, 1) + hi[order]
        uniq, first, count = np.unique(key, return_index=True, return_counts=True)
        rows = uniq // max(n_nodes, 1)
        cols = uniq % max(n_nodes, 1)

        counts = sp.coo_matrix((np.concatenate([count, count]).astype(np.float64),
                                (np.concatenate([rows, cols]), np.concatenate([cols, rows]))),
                               shape=(n_nodes, n_nodes)).tocsr()
        node_kind = np.array([kind_rank[k] for k, _ in nodes], dtype=np.int64)
        keep, info = caps.select_edges(rows, cols, count, first, n_nodes, int(degree_cap), cap_rule,
                                       node_kind=node_kind, quota=int(quota),
                                       node_kind_name=[k for k, _ in nodes])
        kr, kc = rows[keep], cols[keep]
        ones = np.ones(2 * len(kr), dtype=np.float64)
        capped = sp.coo_matrix((ones, (np.concatenate([kr, kc]), np.concatenate([kc, kr]))),
                               shape=(n_nodes, n_nodes)).tocsr()
        return cls(nodes, counts, capped, int(degree_cap), cap_rule, n_eps,
                   edge_weight=edge_weight, cap_info=info)

    # -- views -------------------------------------------------------------
    @property
    def n_nodes(self) -> int:
        return len(self.nodes)

    @property
    def n_edges(self) -> int:
        """Edges of the capped graph."""
        return int(len(self._edge_rows))

    def binary(self) -> sp.csr_matrix:
        """0/1 adjacency of the uncapped graph (every co-occurring pair)."""
        b = self.counts.copy()
        b.data = np.ones_like(b.data)
        return b

    def degrees(self, which: str = "capped") -> np.ndarray:
        mat = {"capped": self.capped, "binary": self.binary(), "counts": self.counts}[which]
        return np.asarray((mat != 0).sum(axis=1)).ravel().astype(np.int64)

    def weighted(self, theta: Mapping) -> sp.csr_matrix:
        """W(θ): each capped edge's weight times θ of its kind pair.

        ``theta`` maps a kind pair, as a tuple in either order or a string
        ``"hour|place"``, to a weight.  Pairs not given weigh 0.
        """
        vals = np.zeros(len(self.type_pairs), dtype=np.float64)
        pid = {p: k for k, p in enumerate(self.type_pairs)}
        for key, w in theta.items():
            p = _theta_key(key)
            for kind in p:
                if kind not in NODE_KINDS:
                    raise ValueError(f"theta key {key!r}: unknown node kind {kind!r}")
            if p in pid:
                vals[pid[p]] = float(w)
        w = vals[self._edge_pair] * self._edge_w
        n = self.n_nodes
        return sp.coo_matrix((np.concatenate([w, w]),
                              (np.concatenate([self._edge_rows, self._edge_cols]),
                               np.concatenate([self._edge_cols, self._edge_rows]))),
                             shape=(n, n)).tocsr()

    def cue_vector(self, hour, weekday, week) -> np.ndarray:
        """Unit-norm vector over the time nodes present among hour, weekday and week.

        Time nodes absent from the graph are skipped; if none is present the
        zero vector is returned.
        """
        v = np.zeros(self.n_nodes, dtype=np.float64)
        for kind, value in (("hour", hour), ("weekday", weekday), ("week", week)):
            if value is None:
                continue
            i = self.index.get((kind, str(value)))
            if i is not None:
                v[i] = 1.0
        norm = np.linalg.norm(v)
        return v / norm if norm > 0 else v

    def nodes_of(self, kind: str) -> list[int]:
        return [i for i, (k, _) in enumerate(self.nodes) if k == kind]

    def edge_list(self) -> list[tuple[tuple[str, str], tuple[str, str], int]]:
        """Capped edges as ``(node_a, node_b, count)`` with ``a`` before ``b`` in index order."""
        c = self.counts
        return [(self.nodes[i], self.nodes[j], int(c[i, j]))
                for i, j in zip(self._edge_rows.tolist(), self._edge_cols.tolist(), strict=False)]


def graph_summary(g: CooccurrenceGraph) -> dict:
    """Sizes per kind, degree histograms and per-type-pair edge counts (no content)."""
    sizes: dict[str, int] = {}
    for k in g.kinds.tolist():
        sizes[k] = sizes.get(k, 0) + 1
    deg = g.degrees("capped")
    hist = np.bincount(deg, minlength=g.degree_cap + 1) if len(deg) else np.zeros(g.degree_cap + 1, int)
    udeg = g.degrees("binary")
    pairs: dict[str, int] = {}
    for p, k in zip(*np.unique(g._edge_pair, return_counts=True), strict=False):
        a, b = g.type_pairs[int(p)]
        pairs[f"{a}|{b}"] = int(k)
    binary_edges = int(g.counts.nnz // 2)
    return {
        "n_episodes": g.n_episodes,
        "n_nodes": g.n_nodes,
        "nodes_per_kind": sizes,
        "cap_rule": g.cap_rule,
        "cap_info": dict(g.cap_info),
        "edge_weight": g.edge_weight,
        "degree_cap": g.degree_cap,
        "edges_capped": g.n_edges,
        "edges_uncapped": binary_edges,
        "max_degree_capped": int(deg.max()) if len(deg) else 0,
        "max_degree_uncapped": int(udeg.max()) if len(udeg) else 0,
        "degree_histogram": {str(d): int(n) for d, n in enumerate(hist.tolist()) if n},
        "edges_per_type_pair": dict(sorted(pairs.items())),
    }


def _hop_distances(g: CooccurrenceGraph, sources) -> np.ndarray:
    """Unweighted shortest-path lengths (links) in the capped graph from ``sources``."""
    from scipy.sparse.csgraph import shortest_path

    if not len(sources):
        return np.zeros((0, g.n_nodes))
    return shortest_path(g.capped, method="D", directed=False, unweighted=True,
                         indices=np.asarray(sources, dtype=np.int64))


def routine_diagnostics(g: CooccurrenceGraph, trials=None) -> dict:
    """Does the capped graph keep the routine?  (``docs/graph.md``, diagnostics.)

    Returns
    -------
    dict
        ``isolated``: nodes with no capped link (``"kind:label"``);
        ``hours_without_place_2``: hours that co-occur with a place but reach no
        place within two links; ``hour_place_within_2``: share of co-occurring
        (hour, place) pairs whose place is within two links of the hour;
        ``hour_place_linked``: share joined by a direct link; with ``trials``
        (Quiz contract), ``trials_reachable``: share of trials whose correct place
        is reachable from a cue node (hour, weekday, week), and
        ``trials_mean_distance``: the mean shortest distance (links) from the
        nearest cue node over those reachable, ``trials_neighbour``: share at
        distance 1.
    """
    deg = g.degrees("capped")
    isolated = [f"{k}:{lab}" for (k, lab), d in zip(g.nodes, deg.tolist(), strict=False) if d == 0]
    hours = g.nodes_of("hour")
    places = np.array(g.nodes_of("place"), dtype=np.int64)
    out: dict = {"isolated": isolated, "n_isolated": len(isolated)}
    dist = _hop_distances(g, hours)
    counts = g.counts.tocsr()
    no_place, pairs, within2, linked = [], 0, 0, 0
    for r, h in enumerate(hours):
        visited = [p for p in places.tolist() if counts[h, p] > 0]
        if not visited:
            continue
        d = dist[r, visited]
        pairs += len(visited)
        within2 += int((d <= 2).sum())
        linked += int((d <= 1).sum())
        if not len(places) or not (dist[r, places] <= 2).any():
            no_place.append(g.nodes[h][1])
    out["hours_without_place_2"] = no_place
    out["hour_place_within_2"] = within2 / pairs if pairs else None
    out["hour_place_linked"] = linked / pairs if pairs else None
    if trials is not None:
        trials = list(trials)
        cue_sets: list[list[int]] = []
        targets: list[int | None] = []
        for t in trials:
            cue = [g.index.get((k, str(t.get(k)))) for k in TIME_KINDS if t.get(k) is not None]
            cue_sets.append([int(i) for i in cue if i is not None])
            targets.append(g.index.get(("place", str(t.get("correct")))))
        src = sorted({i for c in cue_sets for i in c})
        row = {s_: r for r, s_ in enumerate(src)}
        dd: Any = _hop_distances(g, src)
        best: list[float] = []
        for cue_ids, tgt in zip(cue_sets, targets, strict=False):
            if tgt is None or not cue_ids:
                best.append(np.inf)
                continue
            best.append(float(min(dd[row[c_id], int(tgt)] for c_id in cue_ids)))
        b = np.array(best, dtype=np.float64)
        ok = np.isfinite(b)
        out["n_trials"] = len(trials)
        out["trials_reachable"] = float(ok.mean()) if len(b) else None
        out["trials_neighbour"] = float((b == 1).mean()) if len(b) else None
        out["trials_mean_distance"] = float(b[ok].mean()) if ok.any() else None
    return out
