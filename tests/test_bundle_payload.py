"""The payload: strict schema, allowlist, relabelling, preview, canaries."""

from __future__ import annotations

import copy
import json
import tomllib

import pytest

from agent.errors import DataError
from agent.export import (Relabeller, coarse_date, edge_list_from, payload_from_parts, preview,
                           project_fit, validate_payload)
from agent.canonical import dumps as canonical_json
from agent.policy import bundled_policy_path, load_policy, policy_from_dict

from _bundle_fixtures import FIT, LEDGER, NOW, QUIZ, episodes, make_payload


def policy_with(section, **values):
    raw = tomllib.loads(bundled_policy_path("default").read_text())
    raw[section].update(values)
    return policy_from_dict(raw)


def test_valid_payload_passes():
    validate_payload(make_payload())


@pytest.mark.parametrize("path,value,match", [
    (("counts", "pairs", "hour|place"), -1, r"\[counts.pairs.hour\|place\] expected an integer >= 0"),
    (("counts", "pairs", "gps|place"), 3, r"\[counts.pairs.gps\|place\] unexpected key"),
    (("model", "params", "theta", "hour|place"), "1.2", r"expected a finite number"),
    (("quiz", "answers"), [1, 2], r"\[quiz.answers\] unknown field"),
    (("ledger_digest", "head", "hash"), "not hex!", r"expected hex"),
    (("created",), "2025-12-03T14:05", r"\[created\] '2025-12-03T14:05' is not a day"),
    (("edge_list", "nodes", 0), "place:38.7,-27.2", r"expected a node id"),
])
def test_schema_rejects(path, value, match):
    p = make_payload()
    node = p
    for k in path[:-1]:
        node = node[k]
    node[path[-1]] = value
    with pytest.raises(DataError, match=match):
        validate_payload(p)


def test_missing_field():
    p = make_payload()
    del p["ledger_digest"]
    with pytest.raises(DataError, match=r"\[ledger_digest\] required field is missing"):
        validate_payload(p)


def test_week_granularity_date():
    assert coarse_date(NOW, "week") == "2025-W49"  # 2025-12-03 is in ISO week 49 (Python's isocalendar)
    p = make_payload(policy_with("export", time_granularity="week"))
    assert p["created"] == "2025-W49"


def test_allowlist_removes_kinds_everywhere():
    pol = policy_with("export", allow=["hour", "weekday", "week", "place", "mood"])
    p = make_payload(pol)
    text = json.dumps(p)
    assert "sound" not in text and "motion" not in text
    assert "place|sound" not in p["model"]["params"]["theta"]


def test_flags_withhold_sections():
    pol = policy_with("export", include_edge_list=False, include_model=False, include_quiz_summary=False)
    p = make_payload(pol)
    assert p["edge_list"] is None and p["model"] is None and p["quiz"] is None
    assert set(p["withheld"]) == {"edge_list", "model", "quiz"}


def test_relabelling_hides_ids_and_is_stable():
    r = Relabeller(token=iter(["aaaaaa", "bbbbbb", "aaaaaa", "cccccc"]).__next__)
    edges = [(("place", "P1"), ("hour", "14")), (("place", "P2"), ("sound", "S3"))]
    e = edge_list_from(edges, ["hour", "place", "sound"], r, 5)
    assert e["nodes"] == ["place:paaaaaa", "hour:14", "place:pbbbbbb", "sound:saaaaaa"]
    assert r.code("place", "P1") == "paaaaaa"  # stable


def test_relabelling_never_reuses_a_code():
    r = Relabeller(token=iter(["aaaaaa", "aaaaaa", "bbbbbb"]).__next__)
    assert r.code("place", "P1") != r.code("place", "P2")


def test_project_fit_keeps_only_numbers():
    fit = copy.deepcopy(FIT)
    fit["cv"]["folds"][0]["trial_ids"] = ["t1", "t2"]
    fit["cv"]["pooled"]["note"] = "home at 38.7123,-27.2191"
    fit["centroids"] = [[38.7123, -27.2191]]
    out = project_fit(fit, ["hour", "place", "sound", "mood"])
    text = json.dumps(out)
    assert "38.7123" not in text and "trial_ids" not in text and "centroids" not in text


def test_canaries_do_not_leave():
    # Distinctive values planted in every input that must stay on the device.
    eps = episodes()
    for e in eps:
        e["coverage"] = {"gps_s": 3599.123, "lat": 38.71234567}
        e["key"] = "2025-12-01T14:00+00:00"
    eps[3]["place"] = "Home-Canary-Street"
    fit = copy.deepcopy(FIT)
    fit["params"]["centroid_lat"] = 38.71234567
    fit["cv"]["pooled"]["stamp"] = "2025-12-01T14:05:09Z"
    p = payload_from_parts(load_policy(bundled_policy_path("default")), episodes=eps,
                           edges=[(("place", "Home-Canary-Street"), ("hour", "14"), 3)],
                           fit=fit, quiz_score=QUIZ, ledger_digest=LEDGER, relabel=Relabeller(),
                           created="2025-12-03", software_version="0.1.0")
    blob = canonical_json(p).decode()
    for canary in ("Canary", "38.7123", "3599.123", "14:00", "14:05", "centroid"):
        assert canary not in blob, canary


def test_preview_mentions_every_released_section():
    p = make_payload()
    text = preview(p)
    assert "hour of day with place: 48" in text
    assert f"{len(p['edge_list']['edges'])} links" in text
    assert "20 questions, 18 answered, 50% correct" in text
    assert "Never sent: locations" in text


def test_preview_names_suppressed_cells():
    pol = policy_with("export", small_cell_threshold=50)
    p = make_payload(pol)
    assert p["counts"]["pairs"]["place|mood"] is None
    assert "Withheld because below 50" in preview(p) and "place with mood" in preview(p)


def test_merge_rule_payload_validates_and_previews():
    pol = policy_with("export", small_cell_threshold=20, small_cell_rule="merge")
    p = make_payload(pol)
    assert p["counts"]["pairs"]["other"] == 14 + 17 + 17 + 17 + 17 + 17  # every mood pair is below 20
    assert "all the small pairs together" in preview(p)


def test_project_fit_flattens_interval_metrics():
    out = project_fit(FIT, ["hour", "place", "sound", "mood"])
    assert out["cv"]["pooled"]["agreement"] == 0.6
    assert out["cv"]["pooled"]["agreement_ci_low"] == pytest.approx(0.4)
    assert out["baselines"]["frequency"]["accuracy"] == 0.4
    assert out["baselines"]["chance_level"]["agreement"] == 0.25
    assert out["params"]["reference_pair"] == "hour|place"
    assert "days" not in out["cv"]["folds"][0] and out["cv"]["folds"][0]["fold"] == 0
    assert "2025-11-20" not in json.dumps(out)  # fold dates stay on the device


def test_quiz_agreement_from_the_model():
    assert make_payload()["quiz"]["agreement"] == 0.6
