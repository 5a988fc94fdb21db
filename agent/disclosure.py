"""Disclosure control for exported counts: small-cell suppression, differential privacy, budget.

Terminology (``docs/bundle-format.md``, section "Disclosure control"):

*count vector*
    The integers a bundle releases about the participant's episodes: one
    *episode-pair count* per unordered pair of distinct exported node kinds
    (the number of episodes in which a node of both kinds was present), the
    number of hours observed, and the hours observed per non-time kind.
*privacy unit*
    What differential privacy protects: one episode (one participant-hour) or
    one local day (``policy.privacy.unit``).
*sensitivity*
    The largest L1 change of the count vector when one privacy unit is added
    or removed.

Small-cell suppression: a released count ``0 < n < small_cell_threshold`` is
withheld (``suppress``) or pooled with the other small cells into one
``"other"`` cell (``merge``; the pool is withheld too if it is still small).
Counts of zero are released: they say an event did not happen, which is common
practice in published cell-size rules.  The default threshold 11 follows the
cell-size rule for Medicare data of the US Centers for Medicare & Medicaid
Services (counts 1-10 are not shown), as tabulated on Duke University's
DataShare page "Cell Size Suppression Requirements"
(https://duke.atlassian.net/wiki/spaces/PD/pages/33588869/Cell+Size+Suppression+Requirements).

With DP on, noise is added first and suppression applied to the *noisy*
counts (post-processing, so it costs no privacy); suppressing on true counts
would leak which cells are small.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from itertools import combinations
from collections.abc import Iterable, Mapping, Sequence

from .errors import BudgetError, DataError

TIME_KINDS = ("hour", "weekday", "week")

#: Most local clock hours a calendar day can hold (the autumn day with a repeated hour).
MAX_HOURS_PER_DAY = 25

MERGED_CELL = "other"


def pair_key(a: str, b: str, order: Sequence[str]) -> str:
    """``"hour|place"``: the two kinds in the policy's node order."""
    ra, rb = order.index(a), order.index(b)
    return f"{a}|{b}" if ra <= rb else f"{b}|{a}"


def kind_pairs(kinds: Sequence[str]) -> list[str]:
    """Every unordered pair of distinct kinds, in ``kinds`` order."""
    return [f"{a}|{b}" for a, b in combinations(list(kinds), 2)]


def present_kinds(episode: Mapping, kinds: Sequence[str]) -> list[str]:
    """The exported kinds with at least one node in this episode (time kinds always)."""
    out = []
    for k in kinds:
        if k in TIME_KINDS:
            if episode.get(k) is not None:
                out.append(k)
        elif k == "mood":
            if episode.get("moods"):
                out.append(k)
        elif episode.get(k) is not None:
            out.append(k)
    return out


def count_vector(episodes: Iterable[Mapping], kinds: Sequence[str]) -> dict:
    """The count vector of a set of episodes.

    Returns
    -------
    dict
        ``{"pairs": {"a|b": n}, "hours": n, "hours_by_kind": {kind: n}}`` where
        ``pairs`` holds every pair of distinct ``kinds`` (zeros included) and
        ``hours_by_kind`` every non-time kind.
    """
    kinds = list(kinds)
    pairs = {p: 0 for p in kind_pairs(kinds)}
    by_kind = {k: 0 for k in kinds if k not in TIME_KINDS}
    hours = 0
    for e in episodes:
        hours += 1
        present = present_kinds(e, kinds)
        for a, b in combinations(present, 2):  # `present` keeps the kinds' order
            pairs[f"{a}|{b}"] += 1
        for k in present:
            if k in by_kind:
                by_kind[k] += 1
    return {"pairs": pairs, "hours": hours, "hours_by_kind": by_kind}


def flatten(vector: Mapping) -> list[int]:
    """The count vector as one list: pairs, then hours, then hours by kind."""
    return [*vector["pairs"].values(), vector["hours"], *vector["hours_by_kind"].values()]


def sensitivity(kinds: Sequence[str], unit: str) -> int:
    """L1 sensitivity of :func:`count_vector` under the privacy unit.

    One episode changes each pair count by at most 1, so by at most C(k, 2) in
    total over the pairs (k = number of exported kinds), plus 1 for the hours
    observed and 1 per non-time kind.  A day holds at most 25 episodes.
    """
    kinds = list(kinds)
    k = len(kinds)
    per_episode = math.comb(k, 2) + 1 + sum(1 for x in kinds if x not in TIME_KINDS)
    if unit == "episode":
        return per_episode
    if unit == "day":
        return MAX_HOURS_PER_DAY * per_episode
    raise DataError(f"privacy unit {unit!r}: expected 'episode' or 'day'")


# -- differential privacy -----------------------------------------------------

def _laplace_measurement(scale: float, n: int | None = None):
    import opendp.prelude as dp

    dp.enable_features("contrib")
    space = dp.vector_domain(dp.atom_domain(T=int)), dp.l1_distance(T=int)
    return dp.m.make_laplace(*space, scale=float(scale))


def dp_scale(epsilon: float, sens: int) -> float:
    """Discrete Laplace scale giving ``epsilon``-DP for an L1 sensitivity ``sens``."""
    if not epsilon > 0:
        raise DataError(f"epsilon must be > 0, got {epsilon}")
    return float(sens) / float(epsilon)


def privacy_loss(scale: float, sens: int) -> float:
    """The epsilon OpenDP's privacy map reports for this scale and sensitivity."""
    return float(_laplace_measurement(scale).map(int(sens)))


def add_discrete_laplace(values: Sequence[int], scale: float) -> list[int]:
    """Add discrete Laplace noise (OpenDP ``make_laplace`` on integers) to each value.

    OpenDP draws from the operating system's secure random source and takes no
    seed, by design: a reproducible noise stream would undo the protection.
    """
    values = [int(v) for v in values]
    if not values:
        return []
    return [int(x) for x in _laplace_measurement(scale)(values)]


def discrete_laplace_variance(scale: float) -> float:
    """Variance of the discrete Laplace distribution with scale ``s``: 2e^{-1/s}/(1-e^{-1/s})^2."""
    q = math.exp(-1.0 / scale)
    return 2.0 * q / (1.0 - q) ** 2


# -- suppression ----------------------------------------------------------------

@dataclass
class Released:
    """Counts after disclosure control; ``None`` marks a withheld cell."""

    cells: dict
    suppressed: list
    merged: list

    def as_dict(self) -> dict:
        return {"cells": dict(self.cells), "suppressed": list(self.suppressed), "merged": list(self.merged)}


def suppress_small_cells(counts: Mapping[str, int], threshold: int, rule: str = "suppress") -> Released:
    """Withhold (``suppress``) or pool (``merge``) the counts with ``0 < n < threshold``.

    Parameters
    ----------
    counts : mapping of str to int
    threshold : int
        ``policy.export.small_cell_threshold``; 0 or 1 disables suppression.
    rule : {"suppress", "merge"}
        ``policy.export.small_cell_rule``.

    Returns
    -------
    Released
        ``cells`` keeps every key; a withheld cell is ``None``.  With ``merge``
        the pooled sum appears under ``"other"`` (``None`` if still small), and
        ``merged`` lists the pooled keys.
    """
    if rule not in ("suppress", "merge"):
        raise DataError(f"small_cell_rule {rule!r}: expected 'suppress' or 'merge'")
    if threshold < 0:
        raise DataError(f"small_cell_threshold {threshold}: expected >= 0")
    small = [k for k, v in counts.items() if 0 < int(v) < threshold]
    cells = {k: (None if k in small else int(v)) for k, v in counts.items()}
    if rule == "suppress" or not small:
        return Released(cells, small, [])
    pooled = sum(int(counts[k]) for k in small)
    cells[MERGED_CELL] = pooled if pooled >= threshold else None
    return Released(cells, small if pooled < threshold else [], small)


# -- budget ---------------------------------------------------------------------

def spent_epsilon(vault) -> float:
    """Privacy loss already spent by past exports (vault table ``exports``)."""
    return float(sum(float(rec.get("epsilon") or 0.0) for _, rec in vault.items("exports")))


def check_budget(vault, policy) -> float:
    """The epsilon this export will spend; :class:`BudgetError` if it would exceed the total."""
    if not policy.privacy.dp:
        return 0.0
    spent = spent_epsilon(vault)
    eps = float(policy.privacy.epsilon_per_export)
    total = float(policy.privacy.epsilon_total)
    if spent + eps > total + 1e-9:
        raise BudgetError(f"privacy budget exhausted: {spent:g} of epsilon_total = {total:g} already spent, "
                          f"this export needs {eps:g} more (policy {policy.source}, [privacy])")
    return eps


def release_counts(vector: Mapping, policy) -> dict:
    """Apply DP (if the policy asks) and small-cell suppression to a count vector.

    Returns the ``"counts"`` section of the payload (``docs/bundle-format.md``).
    """
    pairs = dict(vector["pairs"])
    hours = int(vector["hours"])
    by_kind = dict(vector["hours_by_kind"])
    dp_info = None
    if policy.privacy.dp:
        kinds = policy.exported_kinds()
        sens = sensitivity(kinds, policy.privacy.unit)
        eps = float(policy.privacy.epsilon_per_export)
        scale = dp_scale(eps, sens)
        flat = flatten({"pairs": pairs, "hours": hours, "hours_by_kind": by_kind})
        noisy = [max(0, v) for v in add_discrete_laplace(flat, scale)]  # clamping is post-processing
        it = iter(noisy)
        pairs = {k: next(it) for k in pairs}
        hours = next(it)
        by_kind = {k: next(it) for k in by_kind}
        dp_info = {"mechanism": "discrete_laplace", "library": "opendp", "epsilon": eps,
                   "scale": scale, "sensitivity": sens, "unit": policy.privacy.unit}
    rel = suppress_small_cells(pairs, policy.export.small_cell_threshold, policy.export.small_cell_rule)
    return {"pairs": rel.cells, "suppressed": rel.suppressed, "merged": rel.merged,
            "hours": hours, "hours_by_kind": by_kind,
            "small_cell_threshold": int(policy.export.small_cell_threshold),
            "small_cell_rule": policy.export.small_cell_rule, "dp": dp_info}
