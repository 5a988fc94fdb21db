"""Board limits: the file format's validation and every rule's pass and fail."""

from __future__ import annotations

import pytest

from agent.audit.limits import (RULES, LimitsError, check_limits, check_rule, load_limits,
                                validate_limits, RULES_BY_KEY)
from agent.cli import main
from agent.errors import EXIT_DATA, EXIT_FAILURE
from agent.policy import bundled_policy_path, load_policy, validate

REPO = bundled_policy_path("default").parent
EXAMPLE = REPO / "board-limits.example.toml"


@pytest.fixture(scope="module")
def default():
    return load_policy(bundled_policy_path("default"))


def _policy(base, **changes):
    """``base`` with dotted-key changes, e.g. ``retention__raw_seconds=10``."""
    raw = base.as_dict()
    for dotted, v in changes.items():
        s, k = dotted.split("__")
        raw[s][k] = v
    return validate(raw)


# rule -> (limit, policy changes that pass, policy changes that fail)
CASES = {
    "max_raw_seconds": (30, {"retention__raw_seconds": 30}, {"retention__raw_seconds": 31}),
    "max_feature_days": (1, {"retention__feature_days": 1}, {"retention__feature_days": 1.5}),
    "max_gps_buffer_minutes": (60, {"retention__gps_buffer_minutes": 60}, {"retention__gps_buffer_minutes": 61}),
    "forbid_quarantine": (True, {"retention__quarantine": False}, {"retention__quarantine": True}),
    "max_audio_snippet_seconds": (3, {"schedule__audio_snippet_seconds": 3},
                                  {"schedule__audio_snippet_seconds": 5}),
    "min_audio_interval_minutes": (10, {"schedule__audio_interval_minutes": 10},
                                   {"schedule__audio_interval_minutes": 5}),
    "min_gps_interval_minutes": (10, {"schedule__gps_interval_minutes": 15},
                                 {"schedule__gps_interval_minutes": 1}),
    "max_mood_prompts_per_day": (8, {"schedule__mood_prompts_per_day": 8},
                                 {"schedule__mood_prompts_per_day": 9}),
    "forbidden_export_kinds": (["sound"],
                               {"export__allow": ["hour", "weekday", "week", "place", "motion", "mood"]},
                               {"export__allow": ["hour", "sound"]}),
    "allowed_time_granularity": (["week"], {"export__time_granularity": "week"},
                                 {"export__time_granularity": "day"}),
    "min_small_cell_threshold": (11, {"export__small_cell_threshold": 11},
                                 {"export__small_cell_threshold": 10}),
    "require_confirm_each_export": (True, {"export__confirm_each": True}, {"export__confirm_each": False}),
    "require_dp": (True, {"privacy__dp": True}, {"privacy__dp": False}),
    "max_epsilon_per_export": (1.0, {"privacy__dp": True, "privacy__epsilon_per_export": 1.0},
                               {"privacy__dp": True, "privacy__epsilon_per_export": 2.0}),
    "max_epsilon_total": (4.0, {"privacy__dp": True, "privacy__epsilon_total": 4.0},
                          {"privacy__dp": True, "privacy__epsilon_total": 8.0}),
    "max_quiz_age_days": (21, {"quiz__max_age_days": 21}, {"quiz__max_age_days": 28}),
}


def test_every_rule_has_a_case():
    assert set(CASES) == {r.key for r in RULES}


@pytest.mark.parametrize("key", list(CASES))
def test_rule_passes(default, key):
    limit, good, _bad = CASES[key]
    result = check_rule(RULES_BY_KEY[key], limit, _policy(default, **good))
    assert result.ok, result.message


@pytest.mark.parametrize("key", list(CASES))
def test_rule_fails(default, key):
    limit, _good, bad = CASES[key]
    rule = RULES_BY_KEY[key]
    result = check_rule(rule, limit, _policy(default, **bad))
    assert not result.ok
    # The message shows what the policy says and what the board allows.
    assert rule.policy_key in result.message or "exported kinds" in result.message


def test_epsilon_limit_fails_when_dp_off(default):
    r = check_rule(RULES_BY_KEY["max_epsilon_per_export"], 10.0, _policy(default, privacy__dp=False))
    assert not r.ok and "no epsilon bound" in r.message


def test_require_false_is_not_a_requirement(default):
    r = check_rule(RULES_BY_KEY["require_dp"], False, _policy(default, privacy__dp=False))
    assert r.ok


def test_forbidden_kind_outside_graph_is_not_exported(default):
    # exported = graph.nodes ∩ export.allow: sound allowed but not in the graph never leaves.
    p = _policy(default, graph__nodes=["hour", "weekday", "week", "place", "mood"])
    assert check_rule(RULES_BY_KEY["forbidden_export_kinds"], ["sound"], p).ok


def test_message_shows_value_and_limit(default):
    r = check_rule(RULES_BY_KEY["max_raw_seconds"], 20, default)
    assert r.message == "retention.raw_seconds = 30 s; limit ≤ 20 s"


def test_example_file_against_shipped_policies():
    limits = load_limits(EXAMPLE)
    strict = check_limits(load_policy(bundled_policy_path("strict")), limits)
    assert strict.ok, strict.text()
    dflt = check_limits(load_policy(bundled_policy_path("default")), limits)
    assert {r.rule.key for r in dflt.failures} == {
        "forbidden_export_kinds", "allowed_time_granularity", "require_dp",
        "max_epsilon_per_export", "max_epsilon_total"}


def test_cli_exit_code_on_failure(capsys):
    rc = main(["audit", "policy", str(bundled_policy_path("default")), "--limits", str(EXAMPLE)])
    out = capsys.readouterr().out
    assert rc == EXIT_FAILURE
    assert "FAIL  require_dp" in out and "What is collected" in out


def test_cli_exit_code_on_pass(capsys):
    rc = main(["audit", "policy", str(bundled_policy_path("strict")), "--limits", str(EXAMPLE), "--json"])
    import json

    out = json.loads(capsys.readouterr().out)
    assert rc == 0 and out["limits"]["ok"] is True


def test_cli_bad_limits_file_is_data_error(tmp_path, capsys):
    bad = tmp_path / "limits.toml"
    bad.write_text("[limits]\nschema = 1\nmax_raw_secs = 3\n", "utf-8")
    assert main(["audit", "policy", str(bundled_policy_path("strict")), "--limits", str(bad)]) == EXIT_DATA
    assert "did you mean 'max_raw_seconds'" in capsys.readouterr().err


# -- file validation: each broken file its own case ----------------------------

BROKEN = [
    ("unknown-key", "max_raw_secs = 3", "limits.max_raw_secs", "did you mean 'max_raw_seconds'"),
    ("wrong-type", 'max_raw_seconds = "30"', "limits.max_raw_seconds", "expected a number"),
    ("bool-for-number", "max_raw_seconds = true", "limits.max_raw_seconds", "expected a number"),
    ("negative", "max_raw_seconds = -1", "limits.max_raw_seconds", ">= 0"),
    ("not-finite", "max_raw_seconds = inf", "limits.max_raw_seconds", "finite"),
    ("zero-epsilon", "max_epsilon_total = 0", "limits.max_epsilon_total", "> 0"),
    ("number-for-bool", "require_dp = 1", "limits.require_dp", "true or false"),
    ("unknown-kind", 'forbidden_export_kinds = ["sounds"]', "limits.forbidden_export_kinds", "unknown: ['sounds']"),
    ("repeated-kind", 'forbidden_export_kinds = ["sound", "sound"]', "limits.forbidden_export_kinds", "repeats"),
    ("empty-granularity", "allowed_time_granularity = []", "limits.allowed_time_granularity", "non-empty"),
    ("bad-granularity", 'allowed_time_granularity = ["hour"]', "limits.allowed_time_granularity", "unknown"),
    ("name-not-string", "name = 3\nrequire_dp = true", "limits.name", "expected a string"),
]


@pytest.mark.parametrize("case_id,line,key,fragment", BROKEN, ids=[b[0] for b in BROKEN])
def test_broken_limits_file(tmp_path, case_id, line, key, fragment):
    path = tmp_path / f"{case_id}.toml"
    path.write_text(f"[limits]\nschema = 1\n{line}\n", "utf-8")
    with pytest.raises(LimitsError) as info:
        load_limits(path)
    assert info.value.key == key
    assert str(info.value).startswith(f"{path}: [{key}]")
    assert fragment in str(info.value)


def test_limits_missing_schema(tmp_path):
    with pytest.raises(LimitsError, match=r"\[limits.schema\] missing"):
        validate_limits({"limits": {"require_dp": True}}, "x.toml")


def test_limits_future_schema():
    with pytest.raises(LimitsError, match="schema 2 is not supported"):
        validate_limits({"limits": {"schema": 2, "require_dp": True}}, "x.toml")


def test_limits_unknown_section():
    with pytest.raises(LimitsError, match=r"unknown section \[rules\]"):
        validate_limits({"limits": {"schema": 1, "require_dp": True}, "rules": {}}, "x.toml")


def test_limits_without_rules():
    with pytest.raises(LimitsError, match="no rule given"):
        validate_limits({"limits": {"schema": 1, "name": "empty"}}, "x.toml")


def test_limits_not_toml(tmp_path):
    p = tmp_path / "l.toml"
    p.write_text("[limits\nschema = 1\n", "utf-8")
    with pytest.raises(LimitsError, match="not valid TOML") as info:
        load_limits(p)
    assert info.value.key == "<syntax>"


def test_limits_not_utf8(tmp_path):
    p = tmp_path / "l.toml"
    # 0xFF never occurs in UTF-8 (RFC 3629 section 1).
    p.write_bytes(b'[limits]\nschema = 1\nname = "\xff"\nrequire_dp = true\n')
    with pytest.raises(LimitsError, match="not UTF-8"):
        load_limits(p)
