"""``lethe audit diff``: wording and verdict of each change, both fingerprints."""

from __future__ import annotations

import json

import pytest

from agent.audit.diff import describe_change, diff_policies
from agent.audit.schema_doc import KEY_INFO
from agent.cli import main
from agent.policy import SCHEMA, bundled_policy_path, load_policy, validate


@pytest.fixture(scope="module")
def default():
    return load_policy(bundled_policy_path("default"))


def _changed(base, section, key, value):
    raw = base.as_dict()
    raw[section][key] = value
    return validate(raw, f"<{key}>")


def test_raw_retention_wording(default):
    d = diff_policies(default, _changed(default, "retention", "raw_seconds", 10))
    assert [c.words for c in d.changes] == ["Raw files may now exist for 10 s instead of 30 s (stricter)"]


def test_raw_retention_looser(default):
    d = diff_policies(default, _changed(default, "retention", "raw_seconds", 60))
    assert d.changes[0].words == "Raw files may now exist for 60 s instead of 30 s (looser)"
    assert d.changes[0].verdict == "looser"


def test_export_kind_removed(default):
    new = _changed(default, "export", "allow", ["hour", "weekday", "week", "place", "motion", "mood"])
    assert diff_policies(default, new).changes[0].words == "Sound codes will no longer be exported (stricter)"


def test_export_kind_added(default):
    old = _changed(default, "export", "allow", ["hour", "place"])
    new = _changed(default, "export", "allow", ["hour", "place", "mood"])
    assert diff_policies(old, new).changes[0].words == "Reported emotions will now be exported (looser)"


def test_dp_switched_on(default):
    d = diff_policies(default, _changed(default, "privacy", "dp", True))
    assert d.changes[0].words == "Differential privacy is now on instead of off (stricter)"


def test_epsilon_without_dp_has_no_verdict(default):
    d = diff_policies(default, _changed(default, "privacy", "epsilon_total", 2.0))
    c = d.changes[0]
    assert c.verdict is None and "no effect while differential privacy is off" in c.words


def test_granularity_ordered(default):
    d = diff_policies(default, _changed(default, "export", "time_granularity", "week"))
    assert d.changes[0].words == "Exported dates are now no finer than the week instead of day (stricter)"


def test_small_cell_threshold(default):
    d = diff_policies(default, _changed(default, "export", "small_cell_threshold", 5))
    assert d.changes[0].words == "Counts are now withheld below 5 instead of 11 (looser)"


def test_feature_days_singular(default):
    d = diff_policies(default, _changed(default, "retention", "feature_days", 1))
    assert d.changes[0].words == "Features may now be kept for 1 day instead of 2 days (stricter)"


def test_long_text_not_quoted(default):
    d = diff_policies(default, _changed(default, "study", "consent_text", "I agree to something else entirely, "
                                                                        "with a longer sentence."))
    assert d.changes[0].words == "The consent text changed (text too long to quote; compare the files)"


def test_neutral_key_has_no_verdict(default):
    d = diff_policies(default, _changed(default, "model", "folds", 10))
    assert d.changes[0].verdict is None
    assert d.changes[0].words == "Cross-validation folds are now 10 instead of 5"


def test_identical(default):
    d = diff_policies(default, default)
    assert d.identical and d.changes == []
    assert "identical" in d.text()


def test_fingerprints_shown(default):
    new = _changed(default, "retention", "raw_seconds", 10)
    text = diff_policies(default, new).text()
    assert default.fingerprint in text and new.fingerprint in text


def test_every_key_has_words():
    missing = [f"{s}.{k}" for s, f in SCHEMA.items() for k in f if f"{s}.{k}" not in KEY_INFO]
    assert missing == []


@pytest.mark.parametrize("dotted", sorted(set(KEY_INFO) - {"export.allow"}))  # allow: worded per kind
def test_phrases_say_now(dotted):
    # Each change sentence reads "... now NEW instead of OLD".
    assert " now" in KEY_INFO[dotted].phrase


def test_unknown_key_still_reported():
    c = describe_change("future.key", 1, 2)
    assert c.words == "future.key is now 2 instead of 1"


def test_shipped_pair(capsys):
    d, s = bundled_policy_path("default"), bundled_policy_path("strict")
    assert main(["audit", "diff", str(d), str(s), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    verdicts = {c["key"]: c["verdict"] for c in out["changes"]}
    assert verdicts == {"policy.name": None, "retention.raw_seconds": "stricter",
                        "retention.feature_days": "stricter", "export.allow": "stricter",
                        "export.time_granularity": "stricter", "privacy.dp": "stricter"}
