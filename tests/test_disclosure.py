"""Small-cell suppression, the DP count vector's sensitivity, OpenDP noise and the budget."""

from __future__ import annotations

import math
import tomllib

import numpy as np
import pytest
from scipy import stats

from agent.disclosure import (MERGED_CELL, add_discrete_laplace, check_budget, count_vector,
                              discrete_laplace_variance, dp_scale, flatten, privacy_loss, release_counts,
                              sensitivity, spent_epsilon, suppress_small_cells)
from agent.errors import BudgetError
from agent.policy import NODE_KINDS, bundled_policy_path, policy_from_dict


def policy_with(**privacy):
    raw = tomllib.loads(bundled_policy_path("default").read_text())
    raw["privacy"].update(privacy)
    return policy_from_dict(raw)


def full_episode(i, date="2025-12-01", moods=("calm", "tired")):
    return {"key": f"{date}T{i % 24:02d}", "utc": 1764547200.0 + 3600 * i, "date": date, "hour": i % 24,
            "weekday": 0, "week": 1, "place": "P1", "sound": "S1", "motion": "active", "moods": list(moods)}


def l1(a, b):
    return sum(abs(x - y) for x, y in zip(flatten(a), flatten(b), strict=True))


# -- suppression ------------------------------------------------------------------

def test_suppress_small_cells():
    # CMS cell-size rule as tabulated on Duke DataShare "Cell Size Suppression Requirements":
    # counts 1-10 withheld, zero permitted, >= 11 shown (threshold 11).
    r = suppress_small_cells({"a|b": 5, "a|c": 11, "b|c": 0, "c|d": 10}, 11, "suppress")
    assert r.cells == {"a|b": None, "a|c": 11, "b|c": 0, "c|d": None}
    assert r.suppressed == ["a|b", "c|d"]


def test_merge_small_cells_into_other():
    r = suppress_small_cells({"a|b": 5, "a|c": 11, "c|d": 10}, 11, "merge")
    assert r.cells[MERGED_CELL] == 15 and r.cells["a|b"] is None and r.merged == ["a|b", "c|d"]
    assert r.suppressed == []


def test_merged_pool_still_small_is_withheld():
    r = suppress_small_cells({"a|b": 3, "a|c": 20, "c|d": 4}, 11, "merge")
    assert r.cells[MERGED_CELL] is None and r.suppressed == ["a|b", "c|d"]


def test_threshold_zero_releases_everything():
    assert suppress_small_cells({"a|b": 1}, 0).cells == {"a|b": 1}


# -- sensitivity --------------------------------------------------------------------

def test_sensitivity_formula_default_kinds():
    # 7 kinds: C(7,2) = 21 pair counts, + 1 hours, + 4 non-time kinds = 26.
    assert sensitivity(NODE_KINDS, "episode") == 26
    assert sensitivity(NODE_KINDS, "day") == 25 * 26


def test_neighbouring_datasets_episode_unit_attains_bound():
    # Neighbouring datasets: D and D minus one episode with every kind present
    # (and two moods, which must still count once per pair).
    d = [full_episode(i) for i in range(30)]
    full, minus = count_vector(d, NODE_KINDS), count_vector(d[1:], NODE_KINDS)
    assert l1(full, minus) == sensitivity(NODE_KINDS, "episode")


def test_neighbouring_datasets_episode_unit_never_exceeds_bound():
    rng = np.random.default_rng(7)
    d = []
    for i in range(80):
        e = full_episode(i, moods=[m for m in ("calm", "tired", "sad") if rng.random() < 0.4])
        for k in ("place", "sound", "motion"):
            if rng.random() < 0.3:
                e[k] = None
        d.append(e)
    full = count_vector(d, NODE_KINDS)
    worst = max(l1(full, count_vector(d[:i] + d[i + 1:], NODE_KINDS)) for i in range(len(d)))
    assert worst <= sensitivity(NODE_KINDS, "episode")


def test_neighbouring_datasets_day_unit():
    # A day with the repeated autumn hour holds 25 episodes; removing it moves the vector by 25 * 26.
    day = [full_episode(i, date="2025-10-26") for i in range(25)]
    other = [full_episode(i, date="2025-10-27") for i in range(24)]
    full, minus = count_vector(day + other, NODE_KINDS), count_vector(other, NODE_KINDS)
    assert l1(full, minus) == sensitivity(NODE_KINDS, "day")


def test_opendp_privacy_map_gives_the_budgeted_epsilon():
    # OpenDP's own privacy map for the discrete Laplace at scale = sensitivity / epsilon.
    for eps, sens in ((1.0, 26), (0.5, 650), (2.0, 3)):
        assert privacy_loss(dp_scale(eps, sens), sens) == pytest.approx(eps, rel=1e-9)


# -- noise --------------------------------------------------------------------------

def test_variance_formula_matches_scipy_dlaplace():
    # scipy.stats.dlaplace(a) is the discrete Laplace with P(k) ∝ exp(-a|k|); a = 1/scale.
    for s in (0.5, 1.0, 3.0, 26.0):
        assert discrete_laplace_variance(s) == pytest.approx(stats.dlaplace(1.0 / s).var(), rel=1e-12)


def test_opendp_noise_variance_matches_discrete_laplace():
    # OpenDP takes no seed (its noise comes from the OS's secure source, by design), so
    # the test is statistical: with n = 40000 draws the sample variance's standard error
    # is sqrt((m4 - var^2) / n), estimated from the sample; we allow 5 standard errors,
    # a false alarm about once in 1.7 million runs under the normal approximation.
    scale, n = 3.0, 40000
    x = np.asarray(add_discrete_laplace([0] * n, scale), dtype=float)
    var = x.var()
    se = math.sqrt((np.mean((x - x.mean()) ** 4) - var**2) / n)
    assert abs(var - discrete_laplace_variance(scale)) < 5 * se
    assert abs(x.mean()) < 5 * math.sqrt(var / n)
    assert np.all(x == np.round(x))  # integer noise


def test_dp_release_shape():
    p = policy_with(dp=True)
    out = release_counts(count_vector([full_episode(i) for i in range(50)], p.exported_kinds()), p)
    assert out["dp"]["sensitivity"] == 26 and out["dp"]["scale"] == 26.0
    assert all(v is None or (isinstance(v, int) and v >= 0) for v in out["pairs"].values())


# -- budget -------------------------------------------------------------------------

class FakeVault:
    def __init__(self, eps):
        self.rows = [(str(i + 1), {"seq": i + 1, "epsilon": e}) for i, e in enumerate(eps)]

    def items(self, table):
        assert table == "exports"
        return iter(self.rows)


def test_budget_allows_up_to_total():
    p = policy_with(dp=True, epsilon_per_export=1.0, epsilon_total=3.0)
    assert check_budget(FakeVault([1.0, 1.0]), p) == 1.0


def test_budget_refuses_beyond_total():
    p = policy_with(dp=True, epsilon_per_export=1.0, epsilon_total=3.0)
    with pytest.raises(BudgetError, match="privacy budget exhausted: 3 of epsilon_total = 3"):
        check_budget(FakeVault([1.0, 1.0, 1.0]), p)


def test_budget_not_spent_without_dp():
    p = policy_with(dp=False)
    assert check_budget(FakeVault([5.0] * 10), p) == 0.0
    assert spent_epsilon(FakeVault([0.5, 0.25])) == 0.75
