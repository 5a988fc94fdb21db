"""Rival models and the paired comparison machinery (agent/model/rivals.py, compare.py)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats

from agent.model.compare import information_criteria, paired_differences, per_trial
from agent.model.design import ModelGraph, TrialDesign
from agent.model.rivals import ACTR, EpisodeTable, FrequencyLOEO, MostVisited, base_level
from agent.stats import paired_bootstrap_by_day


# ----------------------------------------------------------------------- ACT-R base level
def test_base_level_single_reference():
    # ACT-R tutorial, unit 4: B = ln(sum_j t_j^-d); one reference 100 s ago, d = 0.5:
    # ln(100^-0.5) = -0.5 ln 100 = -2.302585 (worked by hand from the equation)
    assert base_level([100.0], 0.5) == pytest.approx(-2.302585093, abs=1e-9)


def test_base_level_two_references():
    # two references, 10 and 20 units ago, d = 0.5: ln(10^-0.5 + 20^-0.5) = ln(0.316228 + 0.223607)
    assert base_level([10.0, 20.0], 0.5) == pytest.approx(math.log(0.5398346), abs=1e-6)


def test_base_level_matches_the_optimized_learning_approximation():
    # Anderson and Lebiere (1998), "The Atomic Components of Thought": with n references
    # spread evenly over a life of L, B ~ ln(n / (1 - d)) - d ln(L) (optimized learning;
    # from memory).  The exact sum approaches it for many references.
    n, life, d = 20000, 20000.0, 0.5
    ages = (np.arange(n) + 0.5) * life / n
    approx = math.log(n / (1 - d)) - d * math.log(life)
    assert base_level(ages, d) == pytest.approx(approx, abs=0.01)


def test_base_level_refuses_future_references():
    with pytest.raises(ValueError, match="strictly in the past"):
        base_level([5.0, 0.0], 0.5)


# ----------------------------------------------------------------------- LOEO tables
def _eps():
    # place A at hour 9 on day 0 only; place B at hour 9 on days 1 and 2
    out = []
    for day, place in enumerate(["A", "B", "B", "C"]):
        out.append({"key": f"d{day}-09", "utc": 1.0e9 + day * 86400 + 9 * 3600, "date": f"2026-01-0{day + 1}",
                    "hour": 9, "weekday": day % 7, "week": 1, "place": place})
    return out


def _graph():
    nodes = [("hour", "9"), ("place", "A"), ("place", "B"), ("place", "C")]
    a = np.zeros((4, 4))
    a[0, 1:] = a[1:, 0] = 1
    return ModelGraph(a, [k for k, _ in nodes], {n: i for i, n in enumerate(nodes)})


def _trial(episode, correct, date="2026-01-01", weekday=0):
    return {"trial_id": episode, "episode": episode, "date": date, "hour": 9, "weekday": weekday, "week": 1,
            "options": ["A", "B", "C"], "correct": correct, "choice": correct, "issued_at": 1.0e9 + 30 * 86400}


def test_frequency_leaves_the_probed_episode_out():
    eps = _eps()
    d = TrialDesign(_graph(), [_trial("d0-09", "A")])
    s = FrequencyLOEO(_graph(), eps).scores(d)
    # A was seen at hour 9 only in the probed episode itself: nothing left to count
    assert s[0, 0] == pytest.approx(0.0)
    assert s[0, 1] > 0


def test_most_visited_leaves_the_probed_episode_out():
    eps = _eps()
    d = TrialDesign(_graph(), [_trial("d1-09", "B", weekday=1)])
    s = MostVisited(EpisodeTable(eps)).scores(d)
    assert s[0].tolist() == pytest.approx([math.log(2), math.log(2), math.log(2)])


def test_actr_leaves_the_probed_episode_out_and_decays():
    eps = _eps()
    d = TrialDesign(_graph(), [_trial("d2-09", "B")])
    m = ACTR(EpisodeTable(eps))
    s = m.scores_at(d, 0.5)
    now = 1.0e9 + 30 * 86400
    age = lambda day: (now - (1.0e9 + day * 86400 + 9 * 3600)) / 3600  # noqa: E731
    assert s[0, 1] == pytest.approx(math.log(age(1) ** -0.5), rel=1e-9)  # day 2 itself left out
    assert s[0, 0] == pytest.approx(math.log(age(0) ** -0.5), rel=1e-9)


# ----------------------------------------------------------------------- comparisons
def test_paired_day_bootstrap_matches_scipy_bootstrap():
    # reference: scipy.stats.bootstrap (percentile method) resampling days, statistic
    # sum(differences of the drawn days) / number of trials of the drawn days
    rng = np.random.default_rng(4)
    days = np.repeat([f"d{i}" for i in range(25)], rng.integers(3, 12, size=25))
    a = rng.normal(0.1, 1.0, size=len(days))
    b = rng.normal(0.0, 1.0, size=len(days))
    ours = paired_bootstrap_by_day(a, b, days, n_boot=20000, rng=1)
    uniq, inv = np.unique(days, return_inverse=True)
    sums = np.bincount(inv, weights=a - b)
    counts = np.bincount(inv).astype(float)
    ref = scipy.stats.bootstrap((sums, counts), lambda s, c, axis=-1: s.sum(axis=axis) / c.sum(axis=axis),
                                paired=True, vectorized=True, n_resamples=20000, method="percentile",
                                random_state=np.random.default_rng(2))
    assert ours.estimate == pytest.approx((a - b).mean())
    assert ours.low == pytest.approx(ref.confidence_interval.low, abs=0.03)
    assert ours.high == pytest.approx(ref.confidence_interval.high, abs=0.03)


def test_paired_differences_are_model_minus_rival_per_trial():
    g = _graph()
    rng = np.random.default_rng(0)
    trials = [dict(_trial(f"t{i}", "B", date=f"2026-01-{1 + i % 5:02d}"), choice=str(rng.choice(["A", "B", "C"])))
              for i in range(30)]
    d = TrialDesign(g, trials)
    good = np.log(np.tile([0.2, 0.6, 0.2], (30, 1)))
    flat = np.log(np.full((30, 3), 1 / 3))
    out = paired_differences({"model": good, "chance": flat}, d, np.arange(30))
    expect = per_trial(good, d, np.arange(30))["loglik"] - per_trial(flat, d, np.arange(30))["loglik"]
    assert out["chance"]["loglik"]["value"] == pytest.approx(expect.mean())
    lo, hi = out["chance"]["loglik"]["ci"]
    assert lo <= expect.mean() <= hi


def test_information_criteria():
    # Akaike (1974) AIC = 2k - 2 ln L; Schwarz (1978) BIC = k ln n - 2 ln L
    ic = information_criteria(nll=100.0, n_params=3, n=50)
    assert ic["aic"] == pytest.approx(206.0)
    assert ic["bic"] == pytest.approx(3 * math.log(50) + 200.0)


def test_information_criteria_refuse_zero_trials():
    with pytest.raises(ValueError, match="at least one trial"):
        information_criteria(1.0, 1, 0)
