"""Policy loading: a table of broken files, the fingerprint, the shipped policies.

Each broken file is its own case.  The expectation is the contract in
``agent/policy.py`` and ``docs/policy.md``: the error names the file and the
dotted key, and says what was expected.
"""

from __future__ import annotations

import json
import random
import re

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from agent.errors import PolicyError
from agent.policy import SCHEMA, bundled_policy_path, load_policy, validate

DEFAULT = bundled_policy_path("default")
DEFAULT_TEXT = DEFAULT.read_text("utf-8")


def _sub(pattern: str, repl: str, count: int = 1):
    """A text edit on the default policy; fails loudly if the pattern is absent."""

    def edit(text: str) -> str:
        new, n = re.subn(pattern, repl, text, count=count, flags=re.M)
        assert n, f"test bug: pattern {pattern!r} not in default.toml"
        return new

    return edit


def _prepend(line: str):
    return lambda text: line + "\n" + text


# (id, edit of default.toml, expected dotted key, fragment the message must contain)
BROKEN = [
    ("unknown-key-typo", _sub(r"^raw_seconds = 30$", "raw_secnds = 30"),
     "retention.raw_secnds", "did you mean 'raw_seconds'"),
    ("unknown-key-no-near-match", _sub(r"^\[retention\]$", "[retention]\nshred_passes = 3"),
     "retention.shred_passes", "unknown key"),
    ("unknown-section", _sub(r"^\[retention\]$", "[retentoin]"),
     "retentoin", "unknown section"),
    ("wrong-type-string-for-number", _sub(r"^raw_seconds = 30$", 'raw_seconds = "30"'),
     "retention.raw_seconds", "wrong type"),
    ("bool-where-number", _sub(r"^raw_seconds = 30$", "raw_seconds = true"),
     "retention.raw_seconds", "wrong type"),
    ("float-where-integer", _sub(r"^mood_prompts_per_day = 8$", "mood_prompts_per_day = 8.5"),
     "schedule.mood_prompts_per_day", "an integer"),
    ("out-of-range-low", _sub(r"^raw_seconds = 30$", "raw_seconds = 0.5"),
     "retention.raw_seconds", ">= 1.0"),
    ("out-of-range-high", _sub(r"^raw_seconds = 30$", "raw_seconds = 100000"),
     "retention.raw_seconds", "<= 86400.0"),
    ("not-finite", _sub(r"^raw_seconds = 30$", "raw_seconds = nan"),
     "retention.raw_seconds", "finite"),
    ("epsilon-zero-open-interval", _sub(r"^epsilon_per_export = 1.0$", "epsilon_per_export = 0.0"),
     "privacy.epsilon_per_export", "> 0.0"),
    ("not-one-of", _sub(r"^audio_sr = 16000$", "audio_sr = 44000"),
     "intake.audio_sr", "one of"),
    ("unknown-export-kind", _sub(r"^allow = \[.*\]$", 'allow = ["hour", "places"]'),
     "export.allow", "unknown: ['places']"),
    ("repeated-export-kind", _sub(r"^allow = \[.*\]$", 'allow = ["hour", "hour"]'),
     "export.allow", "without repeats"),
    ("emotion-not-identifier", _sub(r'^emotions = \["happy"', 'emotions = ["Happy"'),
     "schedule.emotions", "lower-case identifiers"),
    ("missing-required-key", _sub(r'^study_id = .*$', ""),
     "study.study_id", "required key is missing"),
    ("missing-policy-section", _sub(r"^\[policy\]\nschema = 1$", ""),
     "policy", "missing section [policy]"),
    ("future-schema-version", _sub(r"^schema = 1$", "schema = 2"),
     "policy.schema", "schema 2 is not supported"),
    ("bool-schema-version", _sub(r"^schema = 1$", "schema = true"),
     "policy.schema", "not supported"),
    ("missing-schema", _sub(r"^schema = 1\n", ""),
     "policy.schema", "missing"),
    ("section-not-a-table",
     lambda t: _prepend("episodes = 90")(_sub(r"^\[episodes\]\nmood_window_minutes = 90$", "")(t)),
     "episodes", "expected a table"),
    ("mood-scale-min-not-below-max", _sub(r"^mood_scale_min = 1$", "mood_scale_min = 7"),
     "schedule.mood_scale_max", "greater than mood_scale_min"),
    ("mood-present-outside-scale", _sub(r"^mood_present_at = 5$", "mood_present_at = 9"),
     "schedule.mood_present_at", "within the mood scale"),
    ("quiz-min-age-not-below-max", _sub(r"^min_age_days = 7$", "min_age_days = 21"),
     "quiz.max_age_days", "greater than min_age_days"),
    ("sound-k-min-above-max", _sub(r"^sound_k_min = 3$", "sound_k_min = 9"),
     "codebook.sound_k_max", "at least sound_k_min"),
    ("accel-burst-longer-than-interval", _sub(r"^accel_burst_seconds = 60$", "accel_burst_seconds = 900"),
     "schedule.accel_burst_seconds", "longer than the burst interval"),
    ("settle-not-below-raw-retention", _sub(r"^settle_seconds = 0.5$", "settle_seconds = 30"),
     "retention.settle_seconds", "shorter than raw_seconds"),
    ("dp-epsilon-per-export-above-total",
     lambda t: _sub(r"^dp = false$", "dp = true")(_sub(r"^epsilon_per_export = 1.0$", "epsilon_per_export = 5.0")(t)),
     "privacy.epsilon_per_export", "exceeds epsilon_total"),
    ("graph-without-place", _sub(r'^nodes = \[.*\]$', 'nodes = ["hour", "weekday", "week", "mood"]'),
     "graph.nodes", "'place'"),
    ("invalid-time-zone", _sub(r'^default_timezone = .*$', 'default_timezone = "Atlantis/Harbour"'),
     "study.default_timezone", "IANA time zone"),
    ("bad-key-fingerprint", _sub(r'^key_fingerprint = ""$', 'key_fingerprint = "ABCDEF"'),
     "study.key_fingerprint", "64 lower-case hex digits"),
    ("upper-case-key-fingerprint", _sub(r'^key_fingerprint = ""$', f'key_fingerprint = "{"A" * 64}"'),
     "study.key_fingerprint", "64 lower-case hex digits"),
    ("non-toml-syntax", _sub(r"^raw_seconds = 30$", "raw_seconds: 30"),
     "<syntax>", "not valid TOML"),
    ("duplicate-key", _sub(r"^raw_seconds = 30$", "raw_seconds = 30\nraw_seconds = 10"),
     "<syntax>", "not valid TOML"),
]


@pytest.mark.parametrize("case_id,edit,key,fragment", BROKEN, ids=[b[0] for b in BROKEN])
def test_broken_policy_names_file_and_key(tmp_path, case_id, edit, key, fragment):
    path = tmp_path / f"{case_id}.toml"
    path.write_text(edit(DEFAULT_TEXT), "utf-8")
    with pytest.raises(PolicyError) as info:
        load_policy(path)
    err = info.value
    assert err.key == key
    assert str(err).startswith(f"{path}: [{key}]")
    assert fragment in str(err)


def test_non_utf8_policy_names_file(tmp_path):
    path = tmp_path / "latin1.toml"
    # 0xE9 is "é" in Latin-1 and an invalid start byte in UTF-8 (RFC 3629 section 3).
    path.write_bytes(DEFAULT_TEXT.replace('name = "harbour-days-default"',
                                          'name = "harbour-d\u00e9fault"').encode("latin-1"))
    with pytest.raises(PolicyError) as info:
        load_policy(path)
    assert info.value.key == "<file>"
    assert str(info.value).startswith(str(path))
    assert "not UTF-8" in str(info.value)


def test_missing_file_names_file(tmp_path):
    path = tmp_path / "absent.toml"
    with pytest.raises(PolicyError, match="no such policy file") as info:
        load_policy(path)
    assert str(path) in str(info.value)


def test_the_table_is_large_enough():
    # The foundation issue asks for at least 10 broken files, this task for 12.
    assert len(BROKEN) + 1 >= 12


# -- shipped policies ---------------------------------------------------------

@pytest.mark.parametrize("name", ["default", "strict"])
def test_shipped_policy_loads(name):
    p = load_policy(bundled_policy_path(name))
    assert p.policy.schema == 1
    assert re.fullmatch(r"[0-9a-f]{64}", p.fingerprint)


def test_strict_is_stricter_than_default():
    d, s = load_policy(bundled_policy_path("default")), load_policy(bundled_policy_path("strict"))
    assert s.retention.raw_seconds < d.retention.raw_seconds
    assert "sound" not in s.exported_kinds() and "sound" in d.exported_kinds()
    assert s.privacy.dp and not d.privacy.dp
    assert d.fingerprint != s.fingerprint


# -- fingerprint -----------------------------------------------------------------

def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)  # a JSON string is a TOML basic string here
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise TypeError(type(v))


def _write_toml(raw: dict, rng: random.Random | None = None, noise: bool = False) -> str:
    """Serialise ``raw``; with ``rng``, shuffle section and key order; with ``noise``,
    add comments, blank lines and odd spacing."""
    sections = list(raw)
    if rng:
        rng.shuffle(sections)
    out = []
    for sec in sections:
        keys = list(raw[sec])
        if rng:
            rng.shuffle(keys)
        out.append(f"[{sec}]" + ("   # section comment" if noise else ""))
        for k in keys:
            eq = "   =\t" if noise else " = "
            out.append(f"{k}{eq}{_toml_value(raw[sec][k])}" + ("  # a comment" if noise else ""))
            if noise:
                out.append("")
        out.append("")
    return "\n".join(out)


def _raw_default() -> dict:
    import tomllib

    return tomllib.loads(DEFAULT_TEXT)


BASE_FP = load_policy(DEFAULT).fingerprint


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 2**32 - 1), noise=st.booleans())
def test_fingerprint_stable_across_order_comments_whitespace(seed, noise):
    text = _write_toml(_raw_default(), random.Random(seed), noise)
    import tomllib

    assert validate(tomllib.loads(text)).fingerprint == BASE_FP


def test_fingerprint_counts_defaults_as_given():
    # Resolved policy: leaving a key out equals writing its default.
    raw = _raw_default()
    del raw["retention"]["quarantine"]  # default false
    assert validate(raw).fingerprint == BASE_FP


def test_fingerprint_definition():
    # docs/policy.md: SHA-256 of the RFC 8785 canonical JSON of the resolved policy.
    # For this document (ASCII keys, numbers without exponents) RFC 8785 section 3.2
    # reduces to: keys sorted, no whitespace, integral numbers without ".0"
    # (ECMAScript Number::toString), strings with minimal escapes.  hashlib is
    # checked against FIPS 180-4 by CPython itself.
    import hashlib

    def jcs_numbers(v):
        if isinstance(v, dict):
            return {k: jcs_numbers(x) for k, x in v.items()}
        if isinstance(v, list):
            return [jcs_numbers(x) for x in v]
        if isinstance(v, float) and v.is_integer() and abs(v) < 1e21:
            return int(v)
        return v

    p = load_policy(DEFAULT)
    doc = json.dumps(jcs_numbers(p.as_dict()), sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    assert hashlib.sha256(doc.encode("utf-8")).hexdigest() == p.fingerprint
    assert " " not in doc.replace(p.study.consent_text, "").replace(p.policy.description, "") \
        .replace(p.study.contact, "")


def _alternatives(section: str, key: str, value):
    """Valid-looking different values for one key, most plausible first."""
    if isinstance(value, bool):
        return [not value]
    if isinstance(value, int) and not isinstance(value, bool):
        if key == "audio_sr":
            return [22050]
        return [value + 1, value - 1, value + 2]
    if isinstance(value, float):
        return [value * 1.5, value * 0.5, value + 1.0, value - 0.25, value + 0.25, 1.0]
    if isinstance(value, list):
        alts = [value[:-1], list(reversed(value))]
        if section == "export":
            alts.insert(0, [x for x in value if x != "sound"])
        return alts
    if isinstance(value, str):
        if key == "default_timezone":
            return ["Europe/Lisbon"]
        if key == "key_fingerprint":
            return ["ab" * 32]
        choices = {"motion_method": ["kmeans"], "cap_rule": ["strongest", "arrival"], "foils": ["frequency"],
                   "edge_weight": ["log_count", "binary"],
                   "time_granularity": ["week"], "small_cell_rule": ["merge"], "unit": ["day"]}
        return [c for c in choices.get(key, []) if c != value] + [value + " (revised)"]
    raise TypeError(type(value))


ALL_KEYS = [(s, k) for s, fields in SCHEMA.items() for k in fields if (s, k) != ("policy", "schema")]


@pytest.mark.parametrize("section,key", ALL_KEYS, ids=[f"{s}.{k}" for s, k in ALL_KEYS])
def test_fingerprint_changes_when_value_changes(section, key):
    resolved = load_policy(DEFAULT).as_dict()
    tried = []
    for alt in _alternatives(section, key, resolved[section][key]):
        raw = json.loads(json.dumps(resolved))
        raw[section][key] = alt
        try:
            p = validate(raw)
        except PolicyError as e:
            tried.append(str(e))
            continue
        assert p.fingerprint != BASE_FP
        return
    pytest.fail(f"no valid alternative value for {section}.{key}: {tried}")


@settings(max_examples=40, deadline=None)
@given(raw_s=st.floats(1.0, 86400.0, allow_nan=False), seed=st.integers(0, 2**16))
def test_fingerprint_tracks_raw_retention(raw_s, seed):
    raw = _raw_default()
    raw["retention"]["raw_seconds"] = raw_s
    import tomllib

    text = _write_toml(raw, random.Random(seed))
    p = validate(tomllib.loads(text))
    assert p.retention.raw_seconds == raw_s
    assert (p.fingerprint == BASE_FP) == (raw_s == 30.0)
