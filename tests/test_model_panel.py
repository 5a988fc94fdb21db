"""The comparison machinery is honest: on simulated participants of known type the
comparison comes out as designed (issue 11, item 5).  Common practice, no source:
a method that cannot tell a known generating process from its rivals cannot be
trusted on real people either."""

from __future__ import annotations

import numpy as np
import pytest

from agent.model.fit import fit_model
from agent.model.panel import TYPES, panel_participant, type_log_probabilities
from agent.model.design import TrialDesign, as_model_graph


def _fit(kind):
    eps, g, rows = panel_participant(kind, seed=3, cap_rule="routine", degree_cap=6)
    return fit_model(g, rows, None, seed=0, episodes=eps, recovery_sims=0)


@pytest.mark.slow
def test_random_answers_give_intervals_that_include_chance():
    f = _fit("random")
    chance = f.chance_level
    for name, res in [("model", f.cv), *f.baselines.items()]:
        lo, hi = res["pooled"]["agreement"]["ci"]
        assert lo <= chance["agreement"] <= hi, name
        lo, hi = res["pooled"]["loglik"]["ci"]
        assert lo <= chance["loglik"] <= hi, name
    for name, diff in f.paired.items():
        lo, hi = diff["loglik"]["ci"]
        assert lo <= 0.0 <= hi, name


@pytest.mark.slow
def test_model_answers_make_the_model_win_every_paired_comparison():
    f = _fit("model")
    for name, diff in f.paired.items():
        assert diff["loglik"]["ci"][0] > 0.0, name


@pytest.mark.slow
def test_habit_answers_make_the_frequency_table_beat_the_model():
    f = _fit("habit")
    assert f.paired["frequency"]["loglik"]["ci"][1] < 0.0


def test_every_type_gives_probabilities_over_the_options():
    eps, g, rows = panel_participant("random", days=7, n_trials=20, seed=1, cap_rule="routine", degree_cap=6)
    d = TrialDesign(as_model_graph(g), rows)
    for kind in TYPES:
        lp = type_log_probabilities(kind, g, d, eps)
        p = np.where(d.opt_mask, np.exp(lp), 0.0)
        assert np.allclose(p.sum(axis=1), 1.0), kind


def test_unknown_type_is_refused():
    eps, g, rows = panel_participant("random", days=7, n_trials=5, seed=1)
    with pytest.raises(ValueError, match="expected one of"):
        type_log_probabilities("oracle", g, TrialDesign(as_model_graph(g), rows), eps)


def test_frequency_matched_foils_offer_the_usual_places_as_foils():
    from agent.model.synthetic import quiz_trials, routine_episodes

    eps = routine_episodes(14, seed=0)
    home = "P1"  # the synthetic routine's most visited place
    def foil_share(kind):
        ts = quiz_trials(eps, 150, seed=2, foils=kind)
        wrong = [t for t in ts if t["correct"] != home]
        return np.mean([home in t["options"] for t in wrong])
    assert foil_share("frequency") > foil_share("uniform")
