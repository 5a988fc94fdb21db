"""Degree-cap rules: which co-occurrence links a node keeps (``docs/graph.md``).

Every rule keeps the max-degree idea -- no node ends with more than ``m =
degree_cap`` links, which flattens the spectrum -- and differs in *which* links
survive.  The input is the list of distinct co-occurring pairs ``(rows[k],
cols[k])`` with their counts and their first co-occurrence (rank in time order);
the output is a boolean mask over the pairs.

``"strongest"``
    greedy by decreasing count (ties: first co-occurrence): a pair is admitted
    while both ends have spare degree.
``"arrival"``
    the same greedy pass in order of first co-occurrence (time order).
``"mutual"``
    mutual top-m: a pair survives when it is among the ``m`` strongest pairs of
    *both* its ends (strength ranked by count, ties by first co-occurrence).
    Degrees are at most ``m`` by construction; no pass order is involved.
``"bmatching"``
    a degree-constrained maximum-weight subgraph (maximum-weight b-matching with
    ``b = m`` at every node, weight = count): ``max sum_e c_e x_e`` subject to
    ``sum_{e at v} x_e <= m`` and ``x_e in {0, 1}``, plus two hard routine
    constraints when node kinds are given (always, from the graph): every node
    with a co-occurrence keeps degree >= 1, and every hour with a place reaches
    a place visited at that hour within two kept links (see :func:`b_matching`:
    lazily generated, relaxed in a stated order if infeasible and reported in
    ``cap_info["relaxed"]``).  Solved by :func:`scipy.optimize.milp` (HiGHS
    branch and cut).  At the time limit the solver's best feasible solution is
    kept; with none, the "routine" rule (or, without kinds, the greedy
    "strongest" pass) is used and the fact is recorded.  Greedy by decreasing
    weight is a 1/2-approximation of the plain maximum-weight b-matching:
    b-matchings form a 2-extendible independence system, on which greedy is a
    1/k-approximation (Mestre 2006, "Greedy in approximation algorithms", ESA,
    LNCS 4168; from memory).  The bound is tight in the worst case (a path
    a-b-c-d with weights 1, 1+e, 1 and b = 1).
``"quota"``
    per-type-pair quotas: greedy by decreasing count, a pair admitted while both
    ends have spare degree *and* each end keeps at most ``q`` links to nodes of
    the other end's kind.  So an hour node cannot fill its ``m`` slots with
    weekdays and moods before any place.

``"routine"``
    the routine first, then strength.  (1) For every hour and every place
    visited at that hour, strongest pairs first, unless the place is already
    within two links of the hour: a path hour - k - place through the
    intermediate ``k`` that needs the fewest new links (ties: the strongest
    pair of links), else the direct link if both ends have spare degree.  (2) Every
    node that co-occurs with anything keeps a link (its strongest neighbour with
    spare degree).  (3) The remaining degree is filled greedily by strength, as
    ``"strongest"``.  A greedy construction, fast and deterministic, with no
    optimality claim; the graph records how many of the requirements it could
    not meet (``cap_info["unmet"]``).  Not every cap can keep the routine: a
    place visited at all 24 hours must have all of them in its two-link ball,
    which holds at most ``m + m (m - 1) = m^2`` nodes, so ``m >= 5``, and the
    hubs share the intermediates; on the 14-day demo ``m = 5`` leaves 6 unmet
    and ``m = 6`` none.
    (``"bmatching"`` asks, exactly and by constraint, one visited place per
    hour within two links; this rule asks every visited place.)

Kept links carry a weight (``edge_weight``): ``"binary"`` (1) or
``"log_count"`` (``1 + ln(count)``, 1 for a single co-occurrence).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

CAP_RULES = ("strongest", "arrival", "mutual", "bmatching", "quota", "routine")
EDGE_WEIGHTS = ("binary", "log_count")
DEFAULT_QUOTA = 2
MILP_SAFETY_TIME_LIMIT_S = 60.0  # per MILP solve: a safety net only, never reached on the graphs measured
MILP_NODE_LIMIT = 20_000  # per MILP solve: a deterministic stopping rule (see b_matching)
MILP_REL_GAP = 0.0  # solve to proven optimality of the tie-broken weights
POLISH_NODE_LIMIT = 500  # per polishing MILP (b_matching step 4): deterministic
EXACT_MAX_PAIRS = 120  # b_matching step 2 (the MILP with the hour-place rows) up to this many pairs
DIRECT_AFTER = 2  # routine rule: tuning of the path preference (see routine_greedy)
DIRECT_COST = 3


def _check_cap(degree_cap) -> int:
    if not isinstance(degree_cap, (int, np.integer)) or isinstance(degree_cap, bool) or degree_cap < 1:
        raise ValueError(f"degree_cap {degree_cap!r}: expected a positive integer")
    return int(degree_cap)


def order_arrival(first: np.ndarray, count: np.ndarray) -> np.ndarray:
    """Pairs by first co-occurrence."""
    return np.argsort(first, kind="stable")


def order_strongest(first: np.ndarray, count: np.ndarray) -> np.ndarray:
    """Pairs by decreasing count, ties by first co-occurrence (a total order)."""
    return np.lexsort((first, -count))


def greedy_degree_cap(rows, cols, order, n_nodes: int, degree_cap: int, *,
                      node_kind=None, quota: int | None = None) -> np.ndarray:
    """Admit pairs in ``order`` while both ends have spare degree (and spare quota).

    Parameters
    ----------
    rows, cols : (E,) int arrays
        Ends of every distinct pair.
    order : (E,) int array
        The pass order (a permutation of ``range(E)``).
    n_nodes, degree_cap : int
    node_kind : (n_nodes,) int array, optional
        Kind code of every node; with ``quota`` each node keeps at most
        ``quota`` links to nodes of any one kind.
    quota : int, optional

    Returns
    -------
    keep : (E,) bool array
    """
    degree_cap = _check_cap(degree_cap)
    if quota is not None and (not isinstance(quota, (int, np.integer)) or quota < 1):
        raise ValueError(f"quota {quota!r}: expected a positive integer")
    d = [0] * int(n_nodes)
    keep = np.zeros(len(rows), dtype=bool)
    r = np.asarray(rows).tolist()
    c = np.asarray(cols).tolist()
    if quota is None:
        for k in np.asarray(order).tolist():
            i, j = r[k], c[k]
            if d[i] < degree_cap and d[j] < degree_cap:
                d[i] += 1
                d[j] += 1
                keep[k] = True
        return keep
    kind = np.asarray(node_kind).tolist()
    per: dict[tuple[int, int], int] = {}
    for k in np.asarray(order).tolist():
        i, j = r[k], c[k]
        ki, kj = (i, kind[j]), (j, kind[i])
        if (d[i] < degree_cap and d[j] < degree_cap
                and per.get(ki, 0) < quota and per.get(kj, 0) < quota):
            d[i] += 1
            d[j] += 1
            per[ki] = per.get(ki, 0) + 1
            per[kj] = per.get(kj, 0) + 1
            keep[k] = True
    return keep


def mutual_top_m(rows, cols, count, first, n_nodes: int, degree_cap: int) -> np.ndarray:
    """Keep a pair when it is among the ``degree_cap`` strongest pairs of both ends."""
    m = _check_cap(degree_cap)
    rows, cols = np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64)
    e = len(rows)
    if e == 0:
        return np.zeros(0, dtype=bool)
    # rank of each pair among the pairs of each end: sort incidences by (node, -count, first)
    node = np.concatenate([rows, cols])
    cnt = np.concatenate([count, count])
    fst = np.concatenate([first, first])
    order = np.lexsort((fst, -cnt, node))
    node_s = node[order]
    start = np.searchsorted(node_s, node_s, side="left")
    rank = np.empty(2 * e, dtype=np.int64)
    rank[order] = np.arange(2 * e) - start
    top = rank < m
    return top[:e] & top[e:]


def _pair_index(rows, cols, n_nodes: int) -> tuple[dict[tuple[int, int], int], list[list[int]]]:
    """``eid[(i, j)] = eid[(j, i)] = k`` for pair ``k``, and every node's neighbours in pair order."""
    eid: dict[tuple[int, int], int] = {}
    nbrs: list[list[int]] = [[] for _ in range(int(n_nodes))]
    for k, (i, j) in enumerate(zip(np.asarray(rows).tolist(), np.asarray(cols).tolist(), strict=True)):
        eid[(i, j)] = eid[(j, i)] = k
        nbrs[i].append(j)
        nbrs[j].append(i)
    return eid, nbrs


def _routine_rows(rows, cols, n_nodes: int, node_kind_name, hours=None, via=None):
    """The routine constraints of the b-matching MILP as sparse rows (see :func:`b_matching`).

    Only the hours in ``hours`` (default: every hour) get rows, and with ``via``
    (a set of pair indices) only the intermediates ``k`` whose pair ``(h, k)``
    is in ``via`` get a ``y_hk``.
    Variables: ``x_e`` for the ``E`` pairs, then one ``y_(h,k)`` for every hour
    ``h`` and non-place neighbour ``k`` of ``h`` that co-occurs with a place
    visited at ``h`` ("h reaches such a place through k").

    Returns
    -------
    linked : (n_nodes,) bool array
        Nodes that co-occur with anything (each keeps degree >= 1).
    n_y : int
    y_rows : csr matrix (2 n_y, E + n_y) with bounds (-inf, 0]
        ``y_hk - x_hk <= 0`` and ``y_hk - sum_p x_kp <= 0`` (p visited at h).
    cover : csr matrix (n_hours_with_place, E + n_y) with bounds [1, inf)
        ``sum_p x_hp + sum_k y_hk >= 1``: the hour is within two links of a
        place visited at that hour.
    """
    rows, cols = np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64)
    e = len(rows)
    kind = [str(k) for k in node_kind_name]
    linked = np.zeros(int(n_nodes), dtype=bool)
    linked[rows] = True
    linked[cols] = True
    eid, nbrs = _pair_index(rows, cols, int(n_nodes))
    y_r: list[int] = []
    y_c: list[int] = []
    y_v: list[float] = []
    c_r: list[int] = []
    c_c: list[int] = []
    n_y, n_cover = 0, 0
    for h in range(int(n_nodes)):
        if kind[h] != "hour" or (hours is not None and h not in hours):
            continue
        visited = {p for p in nbrs[h] if kind[p] == "place"}
        if not visited:
            continue
        cover_cols = [eid[(h, p)] for p in sorted(visited)]
        for k in nbrs[h]:
            if kind[k] == "place" or (via is not None and eid[(h, k)] not in via):
                continue
            k_p = [eid[(k, p)] for p in nbrs[k] if p in visited]
            if not k_p:
                continue
            y = e + n_y
            r0 = 2 * n_y
            y_r += [r0, r0]
            y_c += [y, eid[(h, k)]]
            y_v += [1.0, -1.0]
            y_r += [r0 + 1] * (1 + len(k_p))
            y_c += [y] + k_p
            y_v += [1.0] + [-1.0] * len(k_p)
            cover_cols.append(y)
            n_y += 1
        c_r += [n_cover] * len(cover_cols)
        c_c += cover_cols
        n_cover += 1
    y_rows = sp.csr_matrix((y_v, (y_r, y_c)), shape=(2 * n_y, e + n_y))
    cover = sp.csr_matrix((np.ones(len(c_c)), (c_r, c_c)), shape=(n_cover, e + n_y))
    return linked, n_y, y_rows, cover


def _hours_missing_place(rows, cols, keep, n_nodes: int, kind) -> list[int]:
    """Hours that co-occur with a place but reach none of their places within two kept links."""
    full: list[set] = [set() for _ in range(n_nodes)]
    adj: list[set] = [set() for _ in range(n_nodes)]
    for i, j, k in zip(np.asarray(rows).tolist(), np.asarray(cols).tolist(), np.asarray(keep).tolist(),
                       strict=False):
        full[i].add(j)
        full[j].add(i)
        if k:
            adj[i].add(j)
            adj[j].add(i)
    out = []
    for h in range(n_nodes):
        if kind[h] != "hour":
            continue
        places = {p for p in full[h] if kind[p] == "place"}
        if places and not places & adj[h].union(*[adj[k] for k in adj[h]]):
            out.append(h)
    return out


def tie_broken_weights(weight, first, n_nodes: int, degree_cap: int) -> np.ndarray:
    """Integer weights plus a tie-break below one unit: ``w_e + (E - r_e) / (E (K + 1))``.

    ``r_e`` is the pair's rank in :func:`order_strongest` (0 = strongest, ties by
    first co-occurrence) and ``K = min(E, n m / 2)`` bounds the number of kept
    pairs, so the tie-breaks of any kept set sum to less than 1: a set of larger
    integer weight always wins, and among sets of equal weight the one with the
    stronger (earlier) pairs wins.  Without ties the optimum is unique, so it no
    longer depends on how the solver walks through equal optima (its version,
    threads or speed).  Non-integer weights are returned unchanged (the bound
    above needs a unit gap between distinct totals).
    """
    w = np.asarray(weight, dtype=np.float64)
    e = len(w)
    if e == 0 or not np.all(w == np.round(w)):
        return w.copy()
    rank = np.empty(e, dtype=np.int64)
    rank[order_strongest(np.asarray(first), w)] = np.arange(e)
    k = min(e, int(n_nodes) * int(degree_cap) // 2)
    return w + (e - rank) / (e * (k + 1.0))


def _milp_options(time_limit_s: float) -> dict:
    # deterministic stopping rules first (a proven optimum, the node limit); the time
    # limit is only a safety net, and reaching it is recorded ("milp_time_limit")
    return {"time_limit": float(time_limit_s), "node_limit": MILP_NODE_LIMIT, "mip_rel_gap": MILP_REL_GAP}


def b_matching(rows, cols, weight, n_nodes: int, degree_cap: int, *,
               time_limit_s: float = MILP_SAFETY_TIME_LIMIT_S, first=None,
               node_kind_name=None, exact_max_pairs: int = EXACT_MAX_PAIRS) -> tuple[np.ndarray, str, list[str]]:
    """Maximum-weight subgraph with every degree at most ``degree_cap``, keeping the routine.

    With ``node_kind_name`` the problem also carries two hard routine
    constraints (``docs/graph.md``): (a) ``"min_degree"``: every node that
    co-occurs with anything keeps degree >= 1; (b) ``"hour_place"``: every hour
    node that co-occurs with a place is within two kept links of a place visited
    at that hour (a direct link, or a path hour - k - place).  No node ever
    exceeds ``degree_cap``.

    Weights are tie-broken (:func:`tie_broken_weights`) so that the optimum is
    unique, and every MILP stops by deterministic rules (proven optimum, or the
    node limit ``MILP_NODE_LIMIT``), so the result does not depend on the
    machine's speed.  Steps:

    1. the b-matching with (a) only (every degree <= m, every linked node >= 1),
       solved exactly.  If it meets (b) it is the optimum of the whole problem
       (a relaxation's optimum that is feasible); if (a) is infeasible both
       constraints are dropped and reported.
    2. otherwise, on a small problem (at most ``exact_max_pairs`` pairs) the MILP
       with (b) linearised (one auxiliary 0/1 ``y_hk <= x_hk``,
       ``y_hk <= sum_p x_kp`` per hour and intermediate), added lazily for the
       hours found wanting; if (b) is infeasible it is dropped and reported.
    3. on a larger problem, where that MILP takes seconds to minutes (its root
       alone took 9-25 s on the test fixtures), a repair: while some hour misses
       its places, fix to 1 the cheapest link or pair of links hour - k - place
       that reaches one (cheapest by the LP reduced costs of the links not yet
       kept, so the price of displacing stronger links), and solve step 1's
       b-matching again with the fixed links as lower bounds.  Each solve is
       exact, so the result is the best b-matching containing the fixed links;
       its weight is within a few percent of the optimum on the demo-like
       graphs (``docs/graph.md``, measured against the exact solve and the LP
       bound).  If no repair can be fixed, (b) is dropped and reported.

    Returns
    -------
    keep : (E,) bool array
    method : str
        ``"milp"`` (exact optimum under the constraints kept, steps 1-2);
        ``"milp_repair"`` (step 3); ``"milp_node_limit"`` /
        ``"milp_time_limit"`` (step 2 stopped by the node limit / by the safety
        time limit with a feasible solution: every kept constraint holds; the
        time limit makes the result depend on the machine's speed and has not
        been reached on any graph measured); or, when a solve found nothing,
        ``"routine_greedy"`` (with node kinds: the "routine" rule) or
        ``"greedy"`` (the "strongest" pass, within a factor 2 of the optimum
        weight of the plain b-matching).
    relaxed : list of str
        The routine constraints the result does not carry (``"hour_place"``,
        ``"min_degree"``): infeasible, or (step 3) not reached by the repair.
        A constraint with nothing to constrain (no hour with a place) is never
        reported.
    """
    m = _check_cap(degree_cap)
    if isinstance(exact_max_pairs, bool) or not isinstance(exact_max_pairs, (int, np.integer)) or exact_max_pairs < 0:
        raise ValueError(f"exact_max_pairs {exact_max_pairs!r}: expected a non-negative integer")
    rows, cols = np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64)
    w_raw = np.asarray(weight, dtype=np.float64)
    e = len(rows)
    first = np.arange(e) if first is None else np.asarray(first)
    if e == 0:
        return np.zeros(0, dtype=bool), "milp", []
    w = tie_broken_weights(w_raw, first, n_nodes, m)
    n = int(n_nodes)
    inc = sp.csr_matrix((np.ones(2 * e), (np.concatenate([rows, cols]), np.tile(np.arange(e), 2))),
                        shape=(n, e))
    wanted: list[str] = []
    linked = np.zeros(n, dtype=bool)
    kind: list[str] = []
    if node_kind_name is not None:
        kind = [str(k) for k in node_kind_name]
        linked[rows] = True
        linked[cols] = True
        has_place = _hours_missing_place(rows, cols, np.zeros(e, dtype=bool), n, kind)
        wanted = [c for c, live in (("min_degree", linked.any()), ("hour_place", bool(has_place))) if live]
    opts = _milp_options(time_limit_s)

    def fallback():
        if node_kind_name is not None and wanted:
            keep, info = routine_greedy(rows, cols, w_raw, first, n, m, node_kind_name)
            return keep, "routine_greedy", list(wanted) if info["unmet"] else []
        keep = greedy_degree_cap(rows, cols, order_strongest(first, w_raw), n, m)
        return keep, "greedy", list(wanted)

    # 1. the b-matching with (a) only
    plain = _plain_b_matching(inc, w, m, linked if "min_degree" in wanted else None, None, opts)
    if plain is None:
        if "min_degree" not in wanted:
            return fallback()
        plain = _plain_b_matching(inc, w, m, None, None, opts)
        if plain is None:
            return fallback()
        return plain[0], plain[1], list(wanted)
    keep, method = plain
    if "hour_place" not in wanted or not _hours_missing_place(rows, cols, keep, n, kind):
        return keep, method, []
    if e <= exact_max_pairs:
        return _exact_routine(rows, cols, w, n, m, node_kind_name, inc, linked, kind, keep, method, opts)
    return _repair_routine(rows, cols, w, n, m, inc, linked, kind, keep, method, opts)


def _plain_b_matching(inc, w, m: int, linked, fixed, opts) -> tuple[np.ndarray, str] | None:
    """The exact b-matching: degrees <= m, optionally >= 1 at ``linked``, ``x_e = 1`` on ``fixed``."""
    from scipy.optimize import Bounds, LinearConstraint, milp

    e = inc.shape[1]
    cons = [LinearConstraint(inc, -np.inf, m)]
    if linked is not None and linked.any():
        cons.append(LinearConstraint(inc[np.flatnonzero(linked)], 1, np.inf))
    lb = np.zeros(e)
    if fixed:
        lb[sorted(fixed)] = 1.0
    try:
        res = milp(-w, constraints=cons, integrality=np.ones(e), bounds=Bounds(lb, 1), options=opts)
    except (ValueError, RuntimeError):  # pragma: no cover - solver failure
        return None
    if res.x is None or res.status not in (0, 1):
        return None
    return np.asarray(res.x) > 0.5, _method_of(res)


def _method_of(res) -> str:
    if res.status == 0:
        return "milp"
    return "milp_time_limit" if "time" in str(res.message).lower() else "milp_node_limit"


def _exact_routine(rows, cols, w, n, m, node_kind_name, inc, linked, kind, keep0, method0, opts):
    """Step 2 of :func:`b_matching`: the MILP with (b), lazily generated."""
    from scipy.optimize import Bounds, LinearConstraint, milp

    e = len(rows)
    hours: set[int] = set(_hours_missing_place(rows, cols, keep0, n, kind))
    use_min = linked.any()
    for _round in range(n + 1):
        _, n_y, y_rows, cover = _routine_rows(rows, cols, n, node_kind_name, hours=hours)
        inc_v = sp.hstack([inc, sp.csr_matrix((n, n_y))]).tocsr()
        cons = [LinearConstraint(inc_v, -np.inf, m), LinearConstraint(y_rows, -np.inf, 0),
                LinearConstraint(cover, 1, np.inf)]
        if use_min:
            cons.append(LinearConstraint(inc_v[np.flatnonzero(linked)], 1, np.inf))
        try:
            res = milp(np.concatenate([-w, np.zeros(n_y)]), constraints=cons, integrality=np.ones(e + n_y),
                       bounds=Bounds(0, 1), options=opts)
        except (ValueError, RuntimeError):  # pragma: no cover - solver failure
            break
        if res.x is None or res.status not in (0, 1):
            if res.status == 2:  # infeasible: drop (b), keep step 1's optimum
                return keep0, method0, ["hour_place"]
            break
        keep = np.asarray(res.x[:e]) > 0.5
        missing = set(_hours_missing_place(rows, cols, keep, n, kind))
        if not missing:
            return keep, _method_of(res), []
        hours |= missing
    keep, info = routine_greedy(rows, cols, w, None, n, m, node_kind_name)  # pragma: no cover
    return keep, "routine_greedy", (["min_degree", "hour_place"] if info["unmet"] else [])  # pragma: no cover


def _polish(rows, cols, w, n, m, kind, inc, linked, plain_keep, keep, opts, methods, rounds: int = 3):
    """Step 4 of :func:`b_matching`: the MILP with (b) over the intermediates already in use.

    The hour-place rows are generated for every hour, but an hour may reach a
    place only directly or through an intermediate ``k`` whose link ``(h, k)``
    is kept by step 1's optimum or by the current solution.  The current
    solution is feasible there, so the exact optimum of this restricted MILP
    is at least as heavy; repeat with the new solution's links while it gains.
    """
    from scipy.optimize import Bounds, LinearConstraint, milp

    e = len(rows)
    best = keep
    best_w = float(w[keep].sum())
    for _ in range(rounds):
        via = set(np.flatnonzero(plain_keep | best).tolist())
        _, n_y, y_rows, cover = _routine_rows(rows, cols, n, kind, via=via)
        inc_v = sp.hstack([inc, sp.csr_matrix((n, n_y))]).tocsr()
        cons = [LinearConstraint(inc_v, -np.inf, m), LinearConstraint(y_rows, -np.inf, 0),
                LinearConstraint(cover, 1, np.inf)]
        if linked.any():
            cons.append(LinearConstraint(inc_v[np.flatnonzero(linked)], 1, np.inf))
        try:
            res = milp(np.concatenate([-w, np.zeros(n_y)]), constraints=cons, integrality=np.ones(e + n_y),
                       bounds=Bounds(0, 1), options={**opts, "node_limit": POLISH_NODE_LIMIT})
        except (ValueError, RuntimeError):  # pragma: no cover - solver failure
            break
        if res.x is None or res.status not in (0, 1):
            break
        cand = np.asarray(res.x[:e]) > 0.5
        if _hours_missing_place(rows, cols, cand, n, kind) or float(w[cand].sum()) <= best_w + 1e-9:
            break
        methods.add(_method_of(res))
        best, best_w = cand, float(w[cand].sum())
    return best


def _repair_routine(rows, cols, w, n, m, inc, linked, kind, keep, method, opts):
    """Step 3 of :func:`b_matching`: fix the cheapest hour-place repairs, re-solve exactly."""
    from scipy.optimize import linprog

    e = len(rows)
    eid, nbrs = _pair_index(rows, cols, n)
    r_list, c_list = rows.tolist(), cols.tolist()
    use_min = linked if linked.any() else None
    a_ub = inc if use_min is None else sp.vstack([inc, -inc[np.flatnonzero(linked)]]).tocsr()
    b_ub = np.full(n, float(m)) if use_min is None else np.concatenate([np.full(n, float(m)),
                                                                         -np.ones(int(linked.sum()))])
    fixed: set[int] = set()
    banned: set[tuple[int, ...]] = set()
    plain_keep, plain_method = keep, method
    methods = {method}
    for _round in range(4 * n + 4):
        missing = _hours_missing_place(rows, cols, keep, n, kind)
        if not missing:
            keep = _polish(rows, cols, w, n, m, kind, inc, linked, plain_keep, keep, opts, methods)
            return keep, ("milp_repair" if methods == {"milp"} else sorted(methods - {"milp"})[0]), []
        lb = np.zeros(e)
        if fixed:
            lb[sorted(fixed)] = 1.0
        lp = linprog(-w, A_ub=a_ub, b_ub=b_ub, bounds=np.column_stack([lb, np.ones(e)]), method="highs")
        rc = (np.maximum(np.asarray(lp.lower.marginals), 0.0) if lp.status == 0 else np.zeros(e))
        deg_f = [0] * n
        for q in fixed:
            deg_f[r_list[q]] += 1
            deg_f[c_list[q]] += 1
        best: tuple | None = None
        for h in missing:
            visited = sorted(p for p in nbrs[h] if kind[p] == "place")
            vis = set(visited)
            options: list[tuple[int, ...]] = [(eid[(h, p)],) for p in visited]
            options += [(eid[(h, k)], eid[(k, p)]) for k in sorted(nbrs[h]) if kind[k] != "place"
                        for p in sorted(nbrs[k]) if p in vis]
            for opt in options:
                if opt in banned:
                    continue
                need: dict[int, int] = {}
                for q in opt:
                    if q not in fixed:
                        for v in (r_list[q], c_list[q]):
                            need[v] = need.get(v, 0) + 1
                if any(deg_f[v] + c > m for v, c in need.items()):
                    continue
                score = (float(sum(rc[q] for q in opt if not keep[q])), len(opt), opt)
                if best is None or score < best:
                    best = score
        if best is None:
            return plain_keep, plain_method, ["hour_place"]
        trial = fixed | set(best[2])
        got = _plain_b_matching(inc, w, m, use_min, trial, opts)
        if got is None:  # the fixed links leave some node without a link: try another repair
            banned.add(best[2])
            continue
        fixed = trial
        keep, meth = got
        methods.add(meth)
    return plain_keep, plain_method, ["hour_place"]  # pragma: no cover - the loop ends earlier


def routine_greedy(rows, cols, count, first, n_nodes: int, degree_cap: int,
                   node_kind_name) -> tuple[np.ndarray, dict]:
    """The routine rule: routine links first, then the strongest (see the module docstring).

    Returns
    -------
    keep : (E,) bool array
    info : dict
        ``unmet``: routine requirements left unmet (nodes without a link plus
        visited hour-place pairs beyond two links).
    """
    m = _check_cap(degree_cap)
    rows, cols = np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64)
    count = np.asarray(count, dtype=np.float64)
    n, e = int(n_nodes), len(rows)
    first = np.arange(e) if first is None else np.asarray(first)
    kind = [str(k) for k in node_kind_name]
    rank = np.empty(e, dtype=np.int64)
    rank[order_strongest(first, count)] = np.arange(e)  # 0 = strongest
    eid, nbrs = _pair_index(rows, cols, n)
    for v in range(n):  # strongest neighbour first
        nbrs[v].sort(key=lambda u, v=v: int(rank[eid[(v, u)]]))  # type: ignore[misc]
    keep = np.zeros(e, dtype=bool)
    deg = [0] * n
    kept: list[set] = [set() for _ in range(n)]

    def spare(v):
        return deg[v] < m

    def add(i, j):
        k = eid[(i, j)]
        if not keep[k]:
            keep[k] = True
            deg[i] += 1
            deg[j] += 1
            kept[i].add(j)
            kept[j].add(i)

    def linked(i, j):
        return keep[eid[(i, j)]]

    def within_two(h, p):
        return p in kept[h] or any(p in kept[k] for k in kept[h])

    # 1. every visited (hour, place) within two links, strongest pairs first
    pairs = [(h, p) for h in range(n) if kind[h] == "hour" for p in nbrs[h] if kind[p] == "place"]
    pairs.sort(key=lambda hp: rank[eid[hp]])
    for h, p in pairs:
        if within_two(h, p):
            continue
        # a path through the intermediate k needing the fewest new links (ties:
        # the strongest links); the direct link only when no path is possible,
        # since a direct link spends a slot of the place, a hub, on one hour
        # while a link place - k serves every hour linked to k
        best, best_cost = None, None
        for k in set(nbrs[h]) & set(nbrs[p]):
            need_hk, need_kp = not linked(h, k), not linked(k, p)
            if (need_hk and not (spare(h) and spare(k))) or (need_kp and not (spare(p) and spare(k))):
                continue
            if need_hk and need_kp and deg[k] > m - 2:
                continue
            cost = (int(need_hk) + int(need_kp), rank[eid[(h, k)]] + rank[eid[(k, p)]])
            if best_cost is None or cost < best_cost:
                best, best_cost = k, cost
        if best is not None:
            add(h, best)
            add(best, p)
        elif spare(h) and spare(p):
            add(h, p)
    # 2. every node keeps a link: its strongest neighbour with spare degree
    for v in range(n):
        if nbrs[v] and deg[v] == 0:
            for u in nbrs[v]:
                if spare(u):
                    add(v, u)
                    break
    # 3. fill the remaining degree by the strongest pairs
    for k in order_strongest(first, count).tolist():
        i, j = int(rows[k]), int(cols[k])
        if not keep[k] and spare(i) and spare(j):
            add(i, j)
    return keep, {"unmet": routine_unmet(rows, cols, keep, n, kind)}


def routine_unmet(rows, cols, keep, n_nodes: int, node_kind_name) -> int:
    """Routine constraints a kept set leaves unmet (see :func:`routine_b_matching`)."""
    kind = np.asarray([str(k) for k in node_kind_name], dtype=object)
    full: list[set] = [set() for _ in range(int(n_nodes))]
    kept: list[set] = [set() for _ in range(int(n_nodes))]
    for i, j, k in zip(np.asarray(rows).tolist(), np.asarray(cols).tolist(), np.asarray(keep).tolist(), strict=False):
        full[i].add(j)
        full[j].add(i)
        if k:
            kept[i].add(j)
            kept[j].add(i)
    unmet = sum(1 for v in range(int(n_nodes)) if full[v] and not kept[v])
    for h in range(int(n_nodes)):
        if kind[h] != "hour":
            continue
        two = set(kept[h]).union(*[kept[k] for k in kept[h]]) if kept[h] else set()
        unmet += sum(1 for p in full[h] if kind[p] == "place" and p not in two)
    return unmet


def select_edges(rows, cols, count, first, n_nodes: int, degree_cap: int, rule: str, *,
                 node_kind=None, quota: int = DEFAULT_QUOTA, node_kind_name=None) -> tuple[np.ndarray, dict]:
    """Apply a cap rule.  Returns the mask over pairs and a small info dict."""
    if rule not in CAP_RULES:
        raise ValueError(f"cap_rule {rule!r}: expected one of {list(CAP_RULES)}")
    m = _check_cap(degree_cap)
    count = np.asarray(count, dtype=np.float64)
    first = np.asarray(first)
    info: dict = {"rule": rule}
    if rule == "arrival":
        keep = greedy_degree_cap(rows, cols, order_arrival(first, count), n_nodes, m)
    elif rule == "strongest":
        keep = greedy_degree_cap(rows, cols, order_strongest(first, count), n_nodes, m)
    elif rule == "mutual":
        keep = mutual_top_m(rows, cols, count, first, n_nodes, m)
    elif rule == "bmatching":
        keep, method, relaxed = b_matching(rows, cols, count, n_nodes, m, first=first,
                                           node_kind_name=node_kind_name)
        info["method"] = method
        info["relaxed"] = relaxed
    elif rule == "routine":
        if node_kind_name is None:
            raise ValueError("cap_rule 'routine': expected node_kind_name (the kind of every node)")
        keep, more = routine_greedy(rows, cols, count, first, n_nodes, m, node_kind_name)
        info.update(more)
    else:
        if node_kind is None:
            raise ValueError("cap_rule 'quota': expected node_kind (the kind of every node)")
        keep = greedy_degree_cap(rows, cols, order_strongest(first, count), n_nodes, m,
                                 node_kind=node_kind, quota=int(quota))
        info["quota"] = int(quota)
    return keep, info


def edge_weights(count, scheme: str) -> np.ndarray:
    """Weight of each kept link: 1 (``"binary"``) or ``1 + ln(count)`` (``"log_count"``)."""
    if scheme not in EDGE_WEIGHTS:
        raise ValueError(f"edge_weight {scheme!r}: expected one of {list(EDGE_WEIGHTS)}")
    count = np.asarray(count, dtype=np.float64)
    if scheme == "binary":
        return np.ones_like(count)
    return 1.0 + np.log(np.maximum(count, 1.0))
