"""Choosing the type-pair weight grouping per participant (docs/model.md, "Choosing the grouping").

The rule is the project's own (issue 11): candidates whose parameters all
recover with r >= 0.7 around their own fit, then the best held-out
log-likelihood; otherwise the fewest unidentifiable parameters.  No outside
source; the checks below are written from that definition.
"""

import json

import numpy as np
import pytest

from agent.graph import CooccurrenceGraph
from agent.model.design import ModelGraph
from agent.model.fit import choose_grouping, fit_model, render_table
from agent.model.likelihood import GROUPING_CANDIDATES, ModelSpec
from agent.model.recovery import recover
from agent.model.synthetic import quiz_trials, routine_episodes, simulate_answers


def _row(name, ll, bad):
    return {"weights": name, "loglik": ll, "unidentifiable": bad}


# -- the rule, one case each -----------------------------------------------------------------------
def test_identifiable_candidate_beats_a_better_fitting_unidentifiable_one():
    table = [_row("grouped", -1.0, []), _row("classes5", -0.8, ["beta"]), _row("classes2", -1.1, [])]
    assert choose_grouping(table)[0] == "grouped"


def test_among_identifiable_candidates_the_best_held_out_loglik_wins():
    table = [_row("grouped", -1.0, []), _row("classes5", -0.8, []), _row("classes2", -1.1, [])]
    chosen, why = choose_grouping(table)
    assert chosen == "classes5"
    assert "best held-out" in why


def test_without_identifiable_candidates_the_fewest_unidentifiable_wins():
    table = [_row("grouped", -0.7, ["a", "b"]), _row("classes5", -0.9, ["a"]), _row("classes2", -1.1, ["a"])]
    chosen, why = choose_grouping(table)
    assert chosen == "classes5"  # one unidentifiable, tie with classes2 broken by held-out loglik
    assert "no grouping has every parameter identifiable" in why


def test_without_recovery_the_best_held_out_loglik_wins():
    table = [_row("grouped", -1.0, None), _row("classes5", -0.8, None)]
    chosen, why = choose_grouping(table)
    assert chosen == "classes5" and "no recovery" in why


def test_a_forced_grouping_is_kept_whatever_its_figures():
    assert choose_grouping([_row("classes5", -3.0, ["beta"])], forced=True) == (
        "classes5", "asked for (--weights)")


def test_an_empty_candidate_list_is_refused():
    with pytest.raises(ValueError, match="at least one candidate"):
        choose_grouping([])


def test_a_nan_loglik_never_wins():
    table = [_row("grouped", float("nan"), []), _row("classes2", -1.3, [])]
    assert choose_grouping(table)[0] == "classes2"


# -- the two-class grouping --------------------------------------------------------------------------
@pytest.fixture(scope="module")
def demo():
    eps = routine_episodes(10, seed=1)
    g = CooccurrenceGraph.from_episodes(eps, None, cap_rule="strongest")
    mg = ModelGraph.from_graph(g)
    trials = quiz_trials(eps, 80, seed=2)
    rows = simulate_answers(mg, trials, mg.theta_dict(np.ones(len(mg.type_pairs))), beta=2.0, tau=0.3,
                            seed=3)
    return eps, g, mg, trials, rows


def test_classes2_puts_every_pair_but_time_place_in_one_group(demo):
    mg = demo[2]
    spec = ModelSpec.full(mg, weights="classes2")
    assert spec.group_names == ["time-place", "other"]
    for k, pair in enumerate(mg.type_pairs):
        time_place = "place" in pair and bool({"hour", "weekday", "week"} & set(pair))
        assert spec.group_names[spec.pair_group[k]] == ("time-place" if time_place else "other"), pair
    assert spec.n_params == 3  # theta[other], beta, tau


# -- recovery reuse ------------------------------------------------------------------------------------
def test_extending_a_recovery_equals_a_fresh_run(demo):
    _, _, mg, trials, _ = demo
    spec = ModelSpec.full(mg, weights="classes2")
    small = recover(mg, trials, n_sims=3, seed=4, spec=spec, n_jobs=1)
    grown = recover(mg, trials, n_sims=5, seed=4, spec=spec, n_jobs=1, reuse=small)
    fresh = recover(mg, trials, n_sims=5, seed=4, spec=spec, n_jobs=1)
    for name, row in fresh["params"].items():
        np.testing.assert_allclose(grown["params"][name]["fitted"], row["fitted"], rtol=0, atol=0)
        assert grown["params"][name]["r"] == row["r"]


def test_reusing_a_recovery_of_another_set_up_is_refused(demo):
    _, _, mg, trials, _ = demo
    spec = ModelSpec.full(mg, weights="classes2")
    small = recover(mg, trials, n_sims=3, seed=4, spec=spec, n_jobs=1)
    with pytest.raises(ValueError, match="drew other parameters"):
        recover(mg, trials, n_sims=4, seed=5, spec=spec, n_jobs=1, reuse=small)


# -- the fit -------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def auto_fit(demo):
    eps, g, _, _, rows = demo
    return fit_model(g, rows, None, seed=0, episodes=eps, folds=3, restarts=1, recovery_sims=6, n_jobs=1)


def test_auto_fit_considers_every_candidate_and_reports_the_chosen_one(auto_fit):
    g = auto_fit.grouping
    assert [r["weights"] for r in g["candidates"]] == list(GROUPING_CANDIDATES)
    assert g["chosen"] in GROUPING_CANDIDATES and not g["forced"]
    assert auto_fit.params["weights"] == g["chosen"]
    for r in g["candidates"]:
        assert r["screen_sims"] == 6 and isinstance(r["unidentifiable"], list)
    # the rule applied to the reported table gives the reported choice
    assert choose_grouping(g["candidates"])[0] == g["chosen"]


def test_auto_fit_reports_the_chosen_candidates_held_out_figures(auto_fit):
    row = next(r for r in auto_fit.grouping["candidates"] if r["weights"] == auto_fit.grouping["chosen"])
    assert auto_fit.cv["pooled"]["loglik"]["value"] == pytest.approx(row["loglik"], abs=1e-12)


def test_auto_fit_recovery_of_the_chosen_grouping_is_extended_to_the_full_count(auto_fit):
    # with 6 simulations asked for, screening is min(6, max(10, 6 // 2)) = 6: nothing to extend
    assert auto_fit.recovery["n_sims"] == 6
    assert set(auto_fit.recovery["params"]) == set(auto_fit.params["identifiable"])


def test_auto_fit_record_and_table_carry_the_choice(auto_fit):
    d = auto_fit.to_dict()
    json.dumps(d, allow_nan=False)
    assert d["grouping"]["chosen"] == auto_fit.params["weights"]
    text = render_table(d)
    assert "weight grouping: " + d["grouping"]["chosen"] in text
    assert "<- chosen" in text


def test_forced_grouping_fits_only_that_one(demo):
    eps, g, _, _, rows = demo
    f = fit_model(g, rows, None, seed=0, episodes=eps, folds=3, restarts=1, recovery_sims=3,
                  weights="classes5", n_jobs=1)
    assert f.grouping["forced"] and f.grouping["chosen"] == "classes5"
    assert [r["weights"] for r in f.grouping["candidates"]] == ["classes5"]
    assert f.params["weights"] == "classes5"


def test_unknown_grouping_is_refused_by_the_fit(demo):
    eps, g, _, _, rows = demo
    with pytest.raises(ValueError, match="expected 'auto' or one of"):
        fit_model(g, rows, None, episodes=eps, folds=3, recovery_sims=0, weights="six")


def test_the_chosen_groupings_screening_recovery_is_extended_to_the_full_count(demo):
    # 20 simulations asked for: each candidate is screened with max(10, 20 // 2) = 10, and the
    # chosen one's recovery is then extended to 20 (its 10 screening refits reused)
    eps, g, _, _, rows = demo
    f = fit_model(g, rows, None, seed=0, episodes=eps, folds=3, restarts=1, recovery_sims=20, n_jobs=1)
    assert all(r["screen_sims"] == 10 for r in f.grouping["candidates"])
    assert f.recovery["n_sims"] == 20
    assert set(f.recovery["params"]) == set(f.params["identifiable"])
