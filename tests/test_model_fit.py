"""Likelihood, fitting, cross-validation, baselines, recovery and the result record."""

import json

import numpy as np
import pytest
from scipy.optimize import approx_fprime

from agent.errors import DataError
from agent.graph import CooccurrenceGraph
from agent.model.baselines import Frequency
from agent.model.choice import argmax_credit, log_probabilities
from agent.model.crossval import day_folds
from agent.model.design import ModelGraph, TrialDesign, join_answers
from agent.model.fit import fit_model
from agent.model.likelihood import (ActivationCache, ModelSpec, negative_log_likelihood,
                                    nll_and_grad)
from agent.model.recovery import recover
from agent.model.synthetic import quiz_trials, routine_episodes, simulate_answers


@pytest.fixture(scope="module")
def demo():
    eps = routine_episodes(10, seed=1)
    g = CooccurrenceGraph.from_episodes(eps, None, cap_rule="strongest")
    mg = ModelGraph.from_graph(g)
    trials = quiz_trials(eps, 80, seed=2)
    theta = mg.theta_dict(np.ones(len(mg.type_pairs)))
    rows = simulate_answers(mg, trials, theta, beta=2.0, tau=0.2, seed=3)
    return eps, g, mg, trials, rows


# ----------------------------------------------------------------------- likelihood
def test_analytic_gradient_matches_finite_differences(demo):
    # reference: scipy.optimize.approx_fprime (forward differences)
    _, _, mg, _, rows = demo
    d = TrialDesign(mg, rows)
    for spec in (ModelSpec.full(mg), ModelSpec.time_links(mg)):
        cache = ActivationCache(mg, d)
        p = spec.start(np.random.default_rng(4))
        _, grad = nll_and_grad(spec, cache, p)

        def objective(q, spec=spec, cache=cache):  # bound now: the closure is used inside this iteration
            return nll_and_grad(spec, cache, q)[0]

        fd = approx_fprime(p, objective, 1e-6)
        np.testing.assert_allclose(grad, fd, atol=2e-3 * max(1.0, np.abs(fd).max()))


def test_objective_is_nll_plus_penalty(demo):
    _, _, mg, _, rows = demo
    d = TrialDesign(mg, rows)
    spec = ModelSpec.full(mg)
    cache = ActivationCache(mg, d)
    p = spec.start(np.random.default_rng(5))
    obj, _ = nll_and_grad(spec, cache, p)
    assert obj == pytest.approx(negative_log_likelihood(spec, cache, p) + spec.penalty(p)[0])


def test_skipped_trials_do_not_enter_the_likelihood(demo):
    _, _, mg, _, rows = demo
    spec = ModelSpec.full(mg)
    p = spec.start()
    base = negative_log_likelihood(spec, ActivationCache(mg, TrialDesign(mg, rows[:40])), p)
    skipped = [dict(r, choice=None) for r in rows[40:]]
    more = negative_log_likelihood(spec, ActivationCache(mg, TrialDesign(mg, rows[:40] + skipped)), p)
    assert more == pytest.approx(base)


def test_likelihood_uses_choices_not_correct_places(demo):
    _, _, mg, _, rows = demo
    spec = ModelSpec.full(mg)
    p = spec.start()
    swapped = [dict(r, correct=r["choice"]) for r in rows]
    a = negative_log_likelihood(spec, ActivationCache(mg, TrialDesign(mg, rows)), p)
    b = negative_log_likelihood(spec, ActivationCache(mg, TrialDesign(mg, swapped)), p)
    assert a == pytest.approx(b)


def test_scale_of_theta_and_beta_does_not_change_activations(demo):
    # the non-identifiability the normalisation removes: eig(cM) = eig(M)
    _, _, mg, _, rows = demo
    d = TrialDesign(mg, rows)
    cache = ActivationCache(mg, d)
    theta = np.random.default_rng(6).uniform(0.5, 2, len(mg.type_pairs))
    a1 = cache.activations(theta, 1.5)
    a2 = ActivationCache(mg, d).activations(3.0 * theta, 4.5)
    np.testing.assert_allclose(a1, a2, atol=1e-10)


# ----------------------------------------------------------------------- choice rule
def test_softmax_probabilities_sum_to_one_over_options():
    s = np.array([[0.1, 0.5, 0.2, 0.0]])
    mask = np.array([[True, True, True, False]])
    p = np.exp(log_probabilities(s, mask, 0.3))
    assert p[0, 3] == 0.0
    assert p.sum() == pytest.approx(1.0)


def test_argmax_credit_shares_ties():
    lp = np.log(np.array([[0.4, 0.4, 0.2]]))
    mask = np.ones((1, 3), dtype=bool)
    assert argmax_credit(lp, mask, np.array([0]))[0] == pytest.approx(0.5)
    assert argmax_credit(lp, mask, np.array([2]))[0] == 0.0


def test_tau_must_be_positive():
    with pytest.raises(ValueError, match="tau"):
        log_probabilities(np.zeros((1, 2)), np.ones((1, 2), dtype=bool), 0.0)


# ----------------------------------------------------------------------- intervals
# ----------------------------------------------------------------------- folds
def test_folds_keep_days_together(demo):
    _, _, mg, _, rows = demo
    d = TrialDesign(mg, rows)
    folds = day_folds(d, 5, seed=0)
    days = [set(d.dates[f]) for f in folds]
    for i in range(len(days)):
        for j in range(i + 1, len(days)):
            assert not days[i] & days[j]
    assert sorted(np.concatenate(folds)) == sorted(np.flatnonzero(d.answered))


def test_fewer_days_than_folds_gives_one_fold_per_day(demo):
    _, _, mg, _, rows = demo
    two_days = [r for r in rows if r["date"] in {rows[0]["date"], rows[-1]["date"]}]
    d = TrialDesign(mg, two_days)
    assert len(day_folds(d, 5)) == 2


def test_one_day_cannot_be_cross_validated(demo):
    _, _, mg, _, rows = demo
    one = [r for r in rows if r["date"] == rows[0]["date"]]
    with pytest.raises(DataError, match="at least 2 days"):
        day_folds(TrialDesign(mg, one), 5)


# ----------------------------------------------------------------------- design errors
def test_choice_outside_options_is_rejected(demo):
    _, _, mg, _, rows = demo
    bad = [dict(rows[0], choice="P99")]
    with pytest.raises(DataError, match="not among the options"):
        TrialDesign(mg, bad)


def test_correct_outside_options_is_rejected(demo):
    _, _, mg, _, rows = demo
    bad = [dict(rows[0], correct="P99")]
    with pytest.raises(DataError, match="correct place"):
        TrialDesign(mg, bad)


def test_cue_nodes_absent_from_graph_are_dropped(demo):
    _, _, mg, _, rows = demo
    r = dict(rows[0], week=99)  # no week-99 node
    d = TrialDesign(mg, [r])
    assert (d.cue_w[0] > 0).sum() == 2
    assert np.linalg.norm(d.cue_vector(0)) == pytest.approx(1.0)


def test_join_answers_marks_unanswered_as_skipped(demo):
    _, _, _, trials, _ = demo
    answers = [{"trial_id": trials[0]["trial_id"], "choice": trials[0]["options"][0]}]
    rows = join_answers(trials[:3], answers)
    assert rows[0]["choice"] == trials[0]["options"][0]
    assert rows[1]["choice"] is None


# ----------------------------------------------------------------------- baselines
def test_frequency_baseline_prefers_the_most_visited_place_at_that_hour():
    eps = [{"hour": 9, "weekday": 0, "place": "P2"}] * 3 + [{"hour": 9, "weekday": 0, "place": "P1"}]
    nodes = [("hour", "9"), ("weekday", "0"), ("place", "P1"), ("place", "P2")]
    a = np.ones((4, 4)) - np.eye(4)
    mg = ModelGraph(a, [k for k, _ in nodes], {v: i for i, v in enumerate(nodes)})
    trial = {"trial_id": "t", "date": "d", "hour": 9, "weekday": 0, "week": 1,
             "options": ["P1", "P2"], "correct": "P2", "choice": "P2"}
    s = Frequency(mg, eps).scores(TrialDesign(mg, [trial]))
    assert s[0, 1] > s[0, 0]


# ----------------------------------------------------------------------- whole fit
@pytest.fixture(scope="module")
def fitted(demo):
    eps, g, _, _, rows = demo
    return fit_model(g, rows, None, seed=0, episodes=eps, folds=3, restarts=2, recovery_sims=0)


def test_fit_beats_chance_with_interval_excluding_chance(fitted):
    pooled = fitted.cv["pooled"]
    assert pooled["agreement"]["ci"][0] > fitted.chance_level["agreement"]
    assert pooled["loglik"]["ci"][0] > fitted.chance_level["loglik"]


def test_fit_reports_every_baseline_on_the_same_trials(fitted):
    assert set(fitted.baselines) == {"chance", "most_visited", "frequency", "centrality", "time_links", "actr"}
    assert set(fitted.paired) == set(fitted.baselines)
    n = fitted.cv["pooled"]["n"]
    for res in fitted.baselines.values():
        assert res["pooled"]["n"] == n
        assert len(res["folds"]) == len(fitted.cv["folds"])


def test_fit_result_dict_is_json_and_follows_the_contract(fitted):
    d = fitted.to_dict()
    json.dumps(d, allow_nan=False)
    assert set(d["params"]) >= {"theta", "beta", "tau"}
    assert d["params"]["theta"]["hour|place"] == 1.0
    assert {"folds", "pooled"} <= set(d["cv"])
    assert d["n_trials"] == 80


def test_table_names_model_and_baselines(fitted):
    text = fitted.table()
    for label in ("cue-biased eigenvector", "chance", "frequency", "centrality", "time-place"):
        assert label in text


def test_fit_without_answers_is_refused(demo):
    _, g, _, trials, _ = demo
    with pytest.raises(DataError, match="no answered trials"):
        fit_model(g, [dict(t, choice=None) for t in trials], None)


# ----------------------------------------------------------------------- recovery
@pytest.mark.slow
def test_recovery_of_beta_and_tau_reaches_point_nine():
    # Wilson and Collins (2019), rule 6: r >= 0.9 for identifiable parameters;
    # a 14-day participant with 150 probes (recovery needs the data of a real study)
    eps = routine_episodes(14, seed=1)
    mg = ModelGraph.from_graph(CooccurrenceGraph.from_episodes(eps, None, cap_rule="strongest"))
    trials = quiz_trials(eps, 150, seed=2)
    rec = recover(mg, trials, n_sims=30, seed=0, model="beta_tau")
    assert rec["params"]["beta"]["r"] >= 0.9
    assert rec["params"]["tau"]["r"] >= 0.9


def test_recovery_rejects_unknown_model(demo):
    _, _, mg, trials, _ = demo
    with pytest.raises(ValueError, match="expected one of"):
        recover(mg, trials, n_sims=3, model="everything")


def test_recovery_needs_three_simulations(demo):
    _, _, mg, trials, _ = demo
    with pytest.raises(ValueError, match="at least 3"):
        recover(mg, trials, n_sims=2)


def test_time_links_spec_zeroes_every_other_pair(demo):
    _, _, mg, _, _ = demo
    spec = ModelSpec.time_links(mg)
    theta, _, _ = spec.unpack(spec.start())
    for pair, w in zip(mg.type_pairs, theta, strict=True):
        timeish = "place" in pair and ({"hour", "weekday", "week"} & set(pair))
        assert (w > 0) == bool(timeish), pair


def test_frequency_without_episodes_uses_graph_counts():
    nodes = [("hour", "9"), ("weekday", "0"), ("place", "P1"), ("place", "P2")]
    counts = np.zeros((4, 4))
    counts[0, 3] = counts[3, 0] = 5.0  # hour 9 with P2 five times
    counts[0, 2] = counts[2, 0] = 1.0
    a = (counts > 0).astype(float)
    mg = ModelGraph(a, [k for k, _ in nodes], {v: i for i, v in enumerate(nodes)}, counts=counts)
    trial = {"trial_id": "t", "date": "d", "hour": 9, "weekday": 0, "week": 1,
             "options": ["P1", "P2"], "correct": "P2", "choice": "P2"}
    f = Frequency(mg, None)
    assert f.source == "graph counts"
    s = f.scores(TrialDesign(mg, [trial]))
    assert s[0, 1] > s[0, 0]


def test_fit_notes_a_disconnected_graph(fitted):
    # the strongest-cap 10-day graph leaves some hour nodes without edges
    assert fitted.fit["components"] > 1
    assert any("connected components" in n for n in fitted.notes)


def test_fit_carries_recovery_figures_and_identifiability(demo):
    # issue 11, item 3: every fit runs recovery at the participant's own design
    eps, g, _, _, rows = demo
    f = fit_model(g, rows, None, seed=0, episodes=eps, folds=3, restarts=1, recovery_sims=6)
    rec = f.recovery
    assert rec["n_sims"] == 6 and rec["n_trials"] == f.n_answered and rec["draws"] == "around the fit"
    assert set(rec["params"]) == set(f.params["identifiable"])
    for name, row in rec["params"].items():
        assert set(row) == {"r", "bias", "rmse", "identifiable"}
        assert row["identifiable"] == (row["r"] is not None and row["r"] >= 0.7), name
    assert "recovery r" in f.table()
    json.dumps(f.to_dict())


# -- weight groupings (docs/model.md, "Identifiable grouping") ------------------------------------

def _expected_class(pair, coarse):
    # written out from the definition, independently of likelihood.pair_class / COARSE
    fam = {"hour": "time", "weekday": "time", "week": "time", "place": "place",
           "sound": "context", "motion": "context", "mood": "context"}
    a, b = sorted(fam[k] for k in pair)
    if coarse and "place" not in (a, b):
        return "non-place"
    return {("place", "time"): "time-place", ("context", "place"): "place-context",
            ("time", "time"): "time-time", ("context", "time"): "time-context",
            ("context", "context"): "context-context", ("place", "place"): "place-place"}[(a, b)]


@pytest.mark.parametrize("weights,coarse", [("grouped", True), ("classes5", False)])
def test_each_type_pair_falls_in_its_class(demo, weights, coarse):
    mg = demo[2]
    spec = ModelSpec.full(mg, weights=weights)
    for k, pair in enumerate(mg.type_pairs):
        assert spec.group_names[spec.pair_group[k]] == _expected_class(pair, coarse)
    assert spec.reference == "time-place"


def test_default_grouping_has_at_most_three_classes(demo):
    spec = ModelSpec.full(demo[2])
    assert spec.weights == "grouped"
    assert set(spec.group_names) <= {"time-place", "place-context", "non-place", "place-place"}


def test_unknown_weights_scheme_is_refused(demo):
    with pytest.raises(ValueError, match="expected one of"):
        ModelSpec.full(demo[2], weights="six")


# ------------------------------------------------------------- shared fits (speed, issue 11 item 6)
def test_centrality_rival_reused_from_the_nested_fit_equals_its_own_fit(demo):
    # With one restart fit_model reuses the chosen model's nested beta = 0 fits as
    # the centrality rival; they must equal the rival fitted on its own
    # (the same cross-validation, run separately; common practice, no source).
    from agent.model.baselines import EigenModel
    from agent.model.crossval import cross_validate
    from agent.model.rivals import centrality_spec

    eps, g, mg, _, rows = demo
    f = fit_model(g, rows, None, seed=0, episodes=eps, folds=3, restarts=1, recovery_sims=0,
                  weights="grouped", n_jobs=1)
    own = cross_validate({"centrality": EigenModel(centrality_spec(mg, "grouped"), restarts=1, seed=2)},
                         TrialDesign(mg, rows), 3, 0, n_jobs=1, in_sample=True)
    assert f.baselines["centrality"]["pooled"]["loglik"]["value"] == pytest.approx(
        own["centrality"]["pooled"]["loglik"]["value"], abs=1e-12)
    for a, b in zip(f.baselines["centrality"]["folds"], own["centrality"]["folds"], strict=True):
        assert a["loglik"]["value"] == pytest.approx(b["loglik"]["value"], abs=1e-12)
    theta = own["_fitted"]["centrality"].params()["theta"]
    assert f.params["rivals"]["centrality"]["tau"] == pytest.approx(
        own["_fitted"]["centrality"].params()["tau"], rel=1e-12)
    for key, val in theta.items():
        assert f.params["rivals"]["centrality"]["theta"][key] == pytest.approx(val, rel=1e-12)


def test_one_restart_fit_does_not_depend_on_the_random_stream(demo):
    # restarts = 1 starts only at the box centre (and the nested start), so the
    # seed of the draws cannot change the fit (common practice, no source).
    from agent.model.baselines import EigenModel

    _, _, mg, _, rows = demo
    design = TrialDesign(mg, rows)
    a = EigenModel(ModelSpec.full(mg), restarts=1).fit(design, rng=np.random.default_rng(1))
    b = EigenModel(ModelSpec.full(mg), restarts=1).fit(design, rng=np.random.default_rng(2))
    np.testing.assert_array_equal(a.p, b.p)
    assert a.nested is not None and a.nested.spec.fit_beta is False


def test_score_fitted_refuses_a_wrong_number_of_folds(demo):
    from agent.model.crossval import score_fitted

    _, _, mg, _, rows = demo
    with pytest.raises(ValueError, match="one per fold"):
        score_fitted([], TrialDesign(mg, rows), 3, 0)
