"""The fitted-parameters section of the export payload: recovery figures travel, the
unidentifiable parameters are held back from the values cohort summaries read."""

from __future__ import annotations

import copy

import pytest

from agent.errors import DataError
from agent.export import project_fit, validate_payload
from tests._bundle_fixtures import FIT, make_payload

KINDS = ["hour", "weekday", "week", "place", "sound", "motion", "mood"]


def _fit_with_recovery():
    fit = copy.deepcopy(FIT)
    fit["params"]["theta"] = {"hour|place": 1.0, "place|weekday": 1.0, "place|sound": 0.4, "mood|sound": 2.0}
    fit["params"]["theta_groups"] = {"time-place": 1.0, "place-context": 0.4, "context-context": 2.0}
    fit["recovery"] = {"n_sims": 30, "threshold": 0.7, "params": {
        "theta[place-context]": {"r": 0.85, "bias": 0.01, "rmse": 0.3, "identifiable": True},
        "theta[context-context]": {"r": 0.2, "bias": 0.5, "rmse": 1.1, "identifiable": False},
        "beta": {"r": 0.9, "bias": 0.0, "rmse": 0.2, "identifiable": True},
        "tau": {"r": 0.5, "bias": -0.2, "rmse": 0.6, "identifiable": False}}}
    fit["paired"] = {"frequency": {"loglik": {"value": -0.02, "ci": [-0.09, 0.06]}}}
    return fit


def test_recovery_figures_travel_with_every_parameter():
    out = project_fit(_fit_with_recovery(), KINDS)
    rec = out["params"]["recovery"]
    assert set(rec) == {"theta[place-context]", "theta[context-context]", "beta", "tau"}
    assert rec["theta[context-context]"] == {"value": 2.0, "r": 0.2, "bias": 0.5, "rmse": 1.1,
                                             "identifiable": False}
    assert out["params"]["groups"]["place-context"] == 0.4


def test_unidentifiable_parameters_are_left_out_of_the_summary_values():
    out = project_fit(_fit_with_recovery(), KINDS)
    # context-context (mood|sound) not identifiable: dropped; time-place is the fixed reference
    assert set(out["params"]["theta"]) == {"hour|place", "place|weekday", "place|sound"}
    assert out["params"]["tau"] is None and out["params"]["beta"] == 2.0


def test_paired_differences_travel_flattened():
    out = project_fit(_fit_with_recovery(), KINDS)
    assert out["paired"]["frequency"] == {"loglik": -0.02, "loglik_ci_low": -0.09, "loglik_ci_high": 0.06}


def test_payload_with_recovery_validates():
    p = make_payload()
    p["model"] = project_fit(_fit_with_recovery(), KINDS)
    validate_payload(p)


def test_recovery_flag_must_be_boolean():
    p = make_payload()
    p["model"] = project_fit(_fit_with_recovery(), KINDS)
    p["model"]["params"]["recovery"]["beta"]["identifiable"] = "yes"
    with pytest.raises(DataError, match="expected true or false"):
        validate_payload(p)


def test_unknown_parameter_name_is_refused():
    p = make_payload()
    p["model"] = project_fit(_fit_with_recovery(), KINDS)
    p["model"]["params"]["recovery"]["gamma"] = p["model"]["params"]["recovery"]["beta"]
    with pytest.raises(DataError, match="unexpected key"):
        validate_payload(p)


def test_default_grouping_holds_back_every_pair_of_an_unidentifiable_non_place_class():
    # The default three classes (docs/model.md): hour|weekday (time-time), hour|sound
    # (time-context) and mood|sound (context-context) all share the "non-place" weight.
    fit = copy.deepcopy(FIT)
    fit["params"]["theta"] = {"hour|place": 1.0, "place|sound": 0.4, "hour|weekday": 5.0,
                              "hour|sound": 5.0, "mood|sound": 5.0}
    fit["params"]["theta_groups"] = {"time-place": 1.0, "place-context": 0.4, "non-place": 5.0}
    fit["recovery"] = {"n_sims": 30, "threshold": 0.7, "params": {
        "theta[place-context]": {"r": 0.9, "bias": 0.0, "rmse": 0.2, "identifiable": True},
        "theta[non-place]": {"r": 0.33, "bias": -1.0, "rmse": 1.2, "identifiable": False},
        "beta": {"r": 0.93, "bias": -0.1, "rmse": 0.2, "identifiable": True},
        "tau": {"r": 0.96, "bias": -0.1, "rmse": 0.2, "identifiable": True}}}
    out = project_fit(fit, KINDS)
    assert set(out["params"]["theta"]) == {"hour|place", "place|sound"}
    assert out["params"]["recovery"]["theta[non-place]"]["value"] == 5.0


# -- the per-participant grouping choice (docs/model.md, "Choosing the grouping per participant") ----
def _fit_with_grouping():
    fit = _fit_with_recovery()
    fit["params"]["theta_groups"] = {"time-place": 1.0, "other": 3.0}
    fit["params"]["weights"] = "classes2"
    fit["recovery"]["params"] = {
        "theta[other]": {"r": 0.3, "bias": 0.2, "rmse": 0.9, "identifiable": False},
        "beta": {"r": 0.9, "bias": 0.0, "rmse": 0.2, "identifiable": True},
        "tau": {"r": 0.9, "bias": 0.0, "rmse": 0.2, "identifiable": True}}
    fit["grouping"] = {"chosen": "classes2", "forced": False, "reason": "free text stays on the device",
                       "rule": "...", "candidates": [
                           {"weights": "grouped", "loglik": -1.1, "aic": 500.0, "n_params": 4,
                            "unidentifiable": ["theta[non-place]"], "min_r": 0.3, "screen_sims": 15},
                           {"weights": "classes2", "loglik": -1.2, "aic": 510.0, "n_params": 3,
                            "unidentifiable": [], "min_r": 0.8, "screen_sims": 15}]}
    return fit


def test_grouping_choice_travels_as_numbers_and_known_names():
    out = project_fit(_fit_with_grouping(), KINDS)
    g = out["params"]["grouping"]
    assert g == {"chosen": "classes2", "forced": False, "candidates": {
        "grouped": {"loglik": -1.1, "aic": 500.0, "n_params": 4.0, "min_r": 0.3, "n_unidentifiable": 1.0},
        "classes2": {"loglik": -1.2, "aic": 510.0, "n_params": 3.0, "min_r": 0.8, "n_unidentifiable": 0.0}}}
    p = make_payload()
    p["model"] = out
    validate_payload(p)


def test_classes2_holds_back_every_pair_of_its_unidentifiable_other_class():
    out = project_fit(_fit_with_grouping(), KINDS)
    # place|sound and mood|sound are "other" (not identifiable); the time-place pairs stay
    assert set(out["params"]["theta"]) == {"hour|place", "place|weekday"}


def test_a_fit_without_grouping_exports_none():
    # fit records from before the per-participant choice still project and validate
    out = project_fit(_fit_with_recovery(), KINDS)
    assert "grouping" not in out["params"]
    p = make_payload()
    p["model"] = out
    validate_payload(p)


def test_unknown_chosen_grouping_is_refused_by_the_schema():
    p = make_payload()
    p["model"] = project_fit(_fit_with_grouping(), KINDS)
    p["model"]["params"]["grouping"]["chosen"] = "seven"
    with pytest.raises(DataError, match="grouping"):
        validate_payload(p)
