"""Plain-array views of a graph and of a set of quiz trials, for the model.

The model never needs more of a graph than its 0/1 capped adjacency, the kind of
each node and the node index, so :class:`ModelGraph` holds exactly those (plus
the optional co-occurrence counts for the frequency baseline).  Anything with
``capped``, ``kinds`` and ``index`` attributes (the real
:class:`agent.graph.CooccurrenceGraph`) plugs in through :func:`as_model_graph`;
tests build graphs directly from arrays or networkx.

:class:`TrialDesign` turns trial dicts (the Quiz contract in
``docs/architecture.md``) into padded index arrays so every solver and the
likelihood work on all trials at once.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import scipy.sparse as sp

from ..errors import DataError

TIME_KINDS = ("hour", "weekday", "week")
PLACE = "place"


def pair_key(pair) -> str:
    """``("hour", "place")`` -> ``"hour|place"`` (kinds sorted)."""
    a, b = sorted(pair)
    return f"{a}|{b}"


def parse_pair(key) -> tuple[str, str]:
    if isinstance(key, str):
        parts = key.split("|")
        if len(parts) != 2:
            raise ValueError(f"type pair {key!r}: expected 'kind|kind' such as 'hour|place'")
        key = parts
    a, b = key
    return tuple(sorted((str(a), str(b))))  # type: ignore[return-value]


class ModelGraph:
    """The parts of a typed graph the model uses.

    Parameters
    ----------
    capped : (n, n) sparse or dense array
        Symmetric nonnegative adjacency (0/1 after the degree cap), zero diagonal.
    kinds : sequence of str, length n
        Node kind of every node (``"hour"``, ``"place"``, ...).
    index : mapping (kind, label) -> int
        Node index; used to find cue and option nodes.
    counts : (n, n) sparse array, optional
        Uncapped co-occurrence counts (frequency baseline fallback).
    """

    def __init__(self, capped, kinds: Sequence[str], index: Mapping, counts=None):
        a = sp.csr_matrix(capped, dtype=np.float64)
        n = a.shape[0]
        if a.shape != (n, n):
            raise ValueError(f"capped adjacency: expected a square matrix, got shape {a.shape}")
        if n and abs(a - a.T).max() > 0:
            raise ValueError("capped adjacency: expected a symmetric matrix")
        if a.nnz and a.data.min() < 0:
            raise ValueError("capped adjacency: expected nonnegative entries")
        if a.diagonal().any():
            raise ValueError("capped adjacency: expected a zero diagonal (no self-loops)")
        kinds_arr = np.asarray([str(k) for k in kinds], dtype=object)
        if kinds_arr.shape != (n,):
            raise ValueError(f"kinds: expected {n} entries (one per node), got {kinds_arr.shape[0]}")
        self.n = int(n)
        self.capped = a
        self.kinds = kinds_arr
        self.index = {(str(k), str(lab)): int(i) for (k, lab), i in dict(index).items()}
        bad = [node for node, i in self.index.items() if not 0 <= i < n]
        if bad:
            raise ValueError(f"index: nodes {bad[:3]} point outside 0..{n - 1}")
        self.counts = None if counts is None else sp.csr_matrix(counts, dtype=np.float64)
        upper = sp.triu(a, k=1).tocoo()
        self.edge_rows = upper.row.astype(np.int64)
        self.edge_cols = upper.col.astype(np.int64)
        self.edge_vals = upper.data.astype(np.float64)
        pairs = [tuple(sorted((kinds_arr[i], kinds_arr[j])))
                 for i, j in zip(self.edge_rows.tolist(), self.edge_cols.tolist(), strict=False)]
        self.type_pairs: list[tuple[str, str]] = sorted(set(pairs))
        pid = {p: k for k, p in enumerate(self.type_pairs)}
        self.edge_pair = np.array([pid[p] for p in pairs], dtype=np.int64)

    # -- construction ----------------------------------------------------
    @classmethod
    def from_graph(cls, g) -> ModelGraph:
        """Wrap anything with ``capped``, ``kinds`` and ``index`` (duck typing)."""
        for attr in ("capped", "kinds", "index"):
            if not hasattr(g, attr):
                raise TypeError(f"graph of type {type(g).__name__}: expected an attribute {attr!r}")
        return cls(getattr(g, "weights", g.capped), list(g.kinds), g.index, getattr(g, "counts", None))

    @classmethod
    def from_networkx(cls, G, kind_attr: str = "kind", default_kind: str = "node",
                      weight: str | None = None) -> ModelGraph:
        """Nodes that are ``(kind, label)`` tuples keep them; others take ``G.nodes[v][kind_attr]``.

        ``weight=None`` gives the 0/1 adjacency (the capped graph is 0/1); name an
        edge attribute to carry weights instead.
        """
        import networkx as nx

        nodes = list(G.nodes)
        a = nx.to_scipy_sparse_array(G, nodelist=nodes, weight=weight, dtype=np.float64)
        a = sp.csr_matrix(a)
        a.setdiag(0)
        a.eliminate_zeros()
        keys = []
        for v in nodes:
            if isinstance(v, tuple) and len(v) == 2:
                keys.append((str(v[0]), str(v[1])))
            else:
                keys.append((str(G.nodes[v].get(kind_attr, default_kind)), str(v)))
        return cls(a, [k for k, _ in keys], {k: i for i, k in enumerate(keys)})

    # -- weights -----------------------------------------------------------
    def theta_vector(self, theta: Mapping) -> np.ndarray:
        """θ per type pair, in ``type_pairs`` order.  Pairs not given weigh 0."""
        vals = np.zeros(len(self.type_pairs))
        pid = {p: k for k, p in enumerate(self.type_pairs)}
        for key, w in theta.items():
            p = parse_pair(key)
            if p in pid:
                w = float(w)
                if not np.isfinite(w) or w < 0:
                    raise ValueError(f"theta[{pair_key(p)!r}] = {w!r}: expected a finite weight >= 0")
                vals[pid[p]] = w
        return vals

    def theta_dict(self, vec) -> dict[str, float]:
        return {pair_key(p): float(v) for p, v in zip(self.type_pairs, vec, strict=False)}

    def dense_w(self, theta_vec) -> np.ndarray:
        """W(θ) as a dense array: each capped edge times θ of its kind pair."""
        w = np.zeros((self.n, self.n))
        vals = self.edge_vals * np.asarray(theta_vec, dtype=np.float64)[self.edge_pair]
        w[self.edge_rows, self.edge_cols] = vals
        w[self.edge_cols, self.edge_rows] = vals
        return w

    def sparse_w(self, theta_vec) -> sp.csr_matrix:
        vals = self.edge_vals * np.asarray(theta_vec, dtype=np.float64)[self.edge_pair]
        r = np.concatenate([self.edge_rows, self.edge_cols])
        c = np.concatenate([self.edge_cols, self.edge_rows])
        return sp.csr_matrix((np.concatenate([vals, vals]), (r, c)), shape=(self.n, self.n))

    def cue(self, hour, weekday, week) -> np.ndarray:
        """Unit-norm cue over the present time nodes, weighted by kind (:func:`cue_kind_weights`)."""
        x = np.zeros(self.n)
        w = cue_kind_weights(self)
        for i in cue_nodes(self.index, hour, weekday, week):
            x[i] = w[self.kinds[i]]
        nrm = np.linalg.norm(x)
        return x / nrm if nrm > 0 else x

    def nodes_of_kind(self, kind: str) -> np.ndarray:
        return np.flatnonzero(self.kinds == kind)


def cue_kind_weights(graph: ModelGraph) -> dict[str, float]:
    """Weight of each cue kind: ``ln(number of nodes of that kind)``.

    The argument (fixed, not fitted): a cue node should count by how much it
    narrows down *when* the probed hour was.  Naming one of ``n`` equally
    likely values carries ``ln n`` nats, so an hour (24 values) weighs ln 24 =
    3.18, a weekday ln 7 = 1.95 and a study week ln W (0 in a one-week study,
    0.69 in a two-week one): the week node, linked to every hour of its week,
    no longer counts as much as the hour.  The cue vector is normalised to unit
    length afterwards.
    """
    out = {}
    for kind in TIME_KINDS:
        k = int(np.count_nonzero(graph.kinds == kind))
        out[kind] = float(np.log(k)) if k > 1 else 0.0
    return out


def as_model_graph(g) -> ModelGraph:
    return g if isinstance(g, ModelGraph) else ModelGraph.from_graph(g)


def cue_nodes(index: Mapping, hour, weekday, week) -> list[int]:
    """Indices of the probed hour's time nodes that exist in the graph."""
    out = []
    for kind, value in zip(TIME_KINDS, (hour, weekday, week), strict=False):
        if value is None:
            continue
        i = index.get((kind, str(value)))
        if i is not None:
            out.append(int(i))
    return out


class TrialDesign:
    """Trials as padded arrays over one graph.

    Attributes
    ----------
    cue_idx, cue_w : (T, 3) int, float
        Cue node indices (padding: ``n``, a virtual all-zero row) and weights
        (:func:`cue_kind_weights` of the present cue nodes, unit norm; 0 for padding).
    opt_idx : (T, m) int
        Node index of every option place (``n`` when the place is not in the
        graph, or for padding); ``opt_mask`` marks real options.
    choice_pos, correct_pos : (T,) int
        Position of the participant's choice (-1: skipped) and of the true place.
    dates : (T,) object
        Local date of the probed hour; cross-validation folds group by it.
    """

    def __init__(self, graph: ModelGraph, trials: Sequence[Mapping], *, source: str = "trials"):
        trials = list(trials)
        n = graph.n
        t_count = len(trials)
        m = max((len(t.get("options") or ()) for t in trials), default=1)
        self.graph = graph
        self.trials = trials
        self.n_nodes = n
        self.cue_idx = np.full((t_count, 3), n, dtype=np.int64)
        self.cue_w = np.zeros((t_count, 3))
        self.opt_idx = np.full((t_count, max(m, 1)), n, dtype=np.int64)
        self.opt_mask = np.zeros((t_count, max(m, 1)), dtype=bool)
        self.choice_pos = np.full(t_count, -1, dtype=np.int64)
        self.correct_pos = np.full(t_count, -1, dtype=np.int64)
        self.dates = np.empty(t_count, dtype=object)
        self.hours = np.zeros(t_count, dtype=np.int64)
        self.weekdays = np.zeros(t_count, dtype=np.int64)
        self.options: list[list[str]] = []
        self.missing_options = 0
        kind_w = cue_kind_weights(graph)
        for t, tr in enumerate(trials):
            tid = tr.get("trial_id", t)
            opts = [str(o) for o in (tr.get("options") or [])]
            if len(opts) < 2:
                raise DataError(f"{source}: trial {tid}: expected at least 2 options, got {len(opts)}")
            if len(set(opts)) != len(opts):
                raise DataError(f"{source}: trial {tid}: options repeat a place ({opts})")
            try:
                hour, weekday = int(tr["hour"]), int(tr["weekday"])
            except (KeyError, TypeError, ValueError):
                raise DataError(f"{source}: trial {tid}: expected integer 'hour' and 'weekday'") from None
            self.hours[t], self.weekdays[t] = hour, weekday
            self.dates[t] = str(tr.get("date", ""))
            cue = cue_nodes(graph.index, hour, weekday, tr.get("week"))
            cw = np.array([kind_w[graph.kinds[i]] for i in cue])
            nrm = float(np.linalg.norm(cw)) if len(cw) else 0.0
            if nrm > 0:
                self.cue_idx[t, : len(cue)] = cue
                self.cue_w[t, : len(cue)] = cw / nrm
            for j, o in enumerate(opts):
                i = graph.index.get((PLACE, o))
                if i is None:
                    self.missing_options += 1
                else:
                    self.opt_idx[t, j] = i
                self.opt_mask[t, j] = True
            correct = tr.get("correct")
            if correct is not None:
                if str(correct) not in opts:
                    raise DataError(f"{source}: trial {tid}: correct place {correct!r} is not among the options")
                self.correct_pos[t] = opts.index(str(correct))
            choice = tr.get("choice")
            if choice is not None:
                if str(choice) not in opts:
                    raise DataError(f"{source}: trial {tid}: choice {choice!r} is not among the options {opts}")
                self.choice_pos[t] = opts.index(str(choice))
            self.options.append(opts)

    def __len__(self) -> int:
        return len(self.trials)

    @property
    def answered(self) -> np.ndarray:
        return self.choice_pos >= 0

    @property
    def n_options(self) -> np.ndarray:
        return self.opt_mask.sum(axis=1)

    def subset(self, rows) -> TrialDesign:
        """A view on some trials (rows of the arrays), sharing the graph."""
        rows = np.asarray(rows, dtype=np.int64)
        out = object.__new__(TrialDesign)
        out.graph, out.n_nodes = self.graph, self.n_nodes
        out.trials = [self.trials[i] for i in rows]
        out.options = [self.options[i] for i in rows]
        out.missing_options = self.missing_options
        for name in ("cue_idx", "cue_w", "opt_idx", "opt_mask", "choice_pos", "correct_pos",
                     "dates", "hours", "weekdays"):
            setattr(out, name, getattr(self, name)[rows])
        return out

    def with_choices(self, choice_pos) -> TrialDesign:
        """A copy with other choices (simulated answers for recovery)."""
        out = self.subset(np.arange(len(self)))
        out.choice_pos = np.asarray(choice_pos, dtype=np.int64).copy()
        return out

    def cue_vector(self, t: int) -> np.ndarray:
        """Dense unit-norm cue of trial ``t`` (for the reference solvers)."""
        x = np.zeros(self.n_nodes + 1)
        np.add.at(x, self.cue_idx[t], self.cue_w[t])
        return x[:-1]


def join_answers(trials: Sequence[Mapping], answers) -> list[dict]:
    """Join trials with answers by ``trial_id``; unanswered trials get ``choice = None``.

    ``answers`` is a mapping ``trial_id -> answer`` or a sequence of answer dicts.
    """
    if isinstance(answers, Mapping):
        amap = {str(k): v for k, v in answers.items()}
    else:
        amap = {str(a["trial_id"]): a for a in answers}
    out = []
    for t in trials:
        a = amap.get(str(t.get("trial_id")))
        row = dict(t)
        row["choice"] = None if a is None else a.get("choice")
        out.append(row)
    return out
