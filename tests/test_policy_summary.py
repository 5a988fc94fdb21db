"""The plain-language policy summary behind ``lethe policy show`` and ``lethe audit policy``."""

from __future__ import annotations

import json

import pytest

from agent.cli import main
from agent.policy import bundled_policy_path, load_policy, validate
from agent.policy_summary import fmt_seconds, summarise


@pytest.fixture(scope="module")
def default():
    return load_policy(bundled_policy_path("default"))


@pytest.fixture(scope="module")
def strict():
    return load_policy(bundled_policy_path("strict"))


def _flat(summary) -> str:
    """The text with line wrapping undone, so phrases can be searched."""
    return " ".join(summary.text().split())


def _with(policy, section, key, value):
    raw = policy.as_dict()
    raw[section][key] = value
    return validate(raw)


@pytest.mark.parametrize("seconds,words", [
    (30, "30 seconds"), (1, "1 second"), (0.5, "0.5 seconds"), (90, "90 seconds"),
    (600, "10 minutes"), (7200, "2 hours"), (5400, "90 minutes"), (172800, "2 days"),
])
def test_duration_words(seconds, words):
    assert fmt_seconds(seconds) == words


def test_raw_retention_figure_comes_from_policy(default):
    assert "destroyed at most 30 seconds after" in _flat(summarise(default))
    other = _with(default, "retention", "raw_seconds", 12.0)
    assert "destroyed at most 12 seconds after" in _flat(summarise(other))


def test_schedule_is_described(default):
    text = _flat(summarise(default))
    assert "3-second sound snippet every 10 minutes" in text
    assert "location fix every 10 minutes" in text
    assert "8 times a day" in text and "11 emotions" in text


def test_withheld_kind_is_named(strict, default):
    assert "never sent: sound codes" in _flat(summarise(strict))
    assert "never sent: sound codes" not in _flat(summarise(default))
    assert summarise(strict).facts["withheld_kinds"] == ["sound"]


def test_dp_described_only_when_on(strict, default):
    on, off = _flat(summarise(strict)), _flat(summarise(default))
    assert "epsilon = 1 of a total budget of" in on and "differential privacy is off" not in on
    assert "differential privacy is off" in off and "epsilon =" not in off


def test_dp_privacy_unit(strict):
    day = _with(strict, "privacy", "unit", "day")
    assert "one whole day" in _flat(summarise(day))
    assert "one hour's record" in _flat(summarise(strict))


def test_granularity_and_confirmation(strict, default):
    assert "no finer than the week" in _flat(summarise(strict))
    assert "no finer than the day" in _flat(summarise(default))
    assert "confirm before each package" in _flat(summarise(default))
    no_confirm = _with(default, "export", "confirm_each", False)
    assert "without asking you each time" in _flat(summarise(no_confirm))


def test_small_cell_rule(default):
    assert "smaller than 11 is left out" in _flat(summarise(default))
    merged = _with(default, "export", "small_cell_rule", "merge")
    assert "smaller than 11 is merged" in _flat(summarise(merged))
    none = _with(default, "export", "small_cell_threshold", 0)
    assert "not suppressed" in _flat(summarise(none))


def test_cautions_present(default):
    text = _flat(summarise(default))
    for needle in ("informed consent", "ethics board", "Data-protection law", "NIST SP 800-88",
                   "backups", "cloud", "copy-on-write", "local law"):
        assert needle in text


def test_fingerprint_shown(default):
    s = summarise(default)
    assert s.fingerprint == default.fingerprint
    assert default.fingerprint in s.text()


def test_as_dict_is_json(default):
    d = json.loads(json.dumps(summarise(default).as_dict()))
    assert d["fingerprint"] == default.fingerprint
    assert [x["heading"] for x in d["sections"]][:2] == [
        "What is collected", "What stays on your laptop, and for how long"]


def test_cli_policy_show(capsys):
    path = bundled_policy_path("strict")
    assert main(["policy", "show", str(path)]) == 0
    out = capsys.readouterr().out
    assert "What leaves your laptop" in out


def test_cli_policy_show_json(capsys):
    path = bundled_policy_path("strict")
    assert main(["policy", "show", str(path), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["facts"]["dp"] is True
