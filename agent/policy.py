"""The study's retention and export policy: schema, validation and fingerprint.

A policy is a TOML file (read with :mod:`tomllib`) in our own versioned schema,
documented in ``docs/policy.md``.  Loading is strict: an unknown section or key,
a wrong type or an out-of-range value raises :class:`~agent.errors.PolicyError`
naming the file, the dotted key, the value and what is allowed.  A typo in an
approved policy must never be ignored silently.

The fingerprint is the SHA-256 of a canonical JSON serialisation of the
*resolved* policy (defaults filled in, keys sorted, no whitespace), so it is
stable across key order, comments and formatting and changes whenever any
effective value changes.
"""

from __future__ import annotations

import hashlib
import json
import math
import tomllib
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType
from typing import Any, Callable, Mapping
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from . import canonical
from .errors import PolicyError

SCHEMA_VERSION = 1

NODE_KINDS = ("hour", "weekday", "week", "place", "sound", "motion", "mood")
RAW_KINDS = ("audio", "gps", "accel", "mood")

# The eleven discrete emotions rated at each prompt in the default study.  The
# list is common practice in experience-sampling work, no single published source.
DEFAULT_EMOTIONS = (
    "happy", "calm", "excited", "proud", "grateful", "bored",
    "tired", "anxious", "sad", "angry", "lonely",
)


@dataclass(frozen=True)
class Field:
    """One policy key: its type, default and an optional range check."""

    kind: type | tuple[type, ...]
    default: Any
    check: Callable[[Any], str | None] | None = None
    help: str = ""


def _range(lo=None, hi=None, *, lo_open=False):
    def check(v):
        if isinstance(v, float) and not math.isfinite(v):
            return f"a finite number (got {v!r})"
        if lo is not None and (v <= lo if lo_open else v < lo):
            return f"{'>' if lo_open else '>='} {lo}"
        if hi is not None and v > hi:
            return f"<= {hi}"
        return None

    return check


def _one_of(*choices):
    def check(v):
        return None if v in choices else "one of " + ", ".join(repr(c) for c in choices)

    return check


def _subset_of(choices, *, nonempty=False, unique=True):
    def check(v):
        bad = [x for x in v if x not in choices]
        if bad:
            return f"a list drawn from {list(choices)} (unknown: {bad})"
        if unique and len(set(v)) != len(v):
            return "a list without repeats"
        if nonempty and not v:
            return "a non-empty list"
        return None

    return check


def _names(v):
    if not v:
        return "a non-empty list of names"
    if len(set(v)) != len(v):
        return "a list without repeats"
    for x in v:
        if not isinstance(x, str) or not x.isidentifier() or x != x.lower():
            return f"lower-case identifiers (got {x!r})"
    return None


def _hex64_or_empty(v):
    if v == "":
        return None
    if len(v) == 64 and all(c in "0123456789abcdef" for c in v):
        return None
    return "64 lower-case hex digits (a SHA-256 fingerprint) or an empty string"


def _tz(v):
    try:
        ZoneInfo(v)
    except (ZoneInfoNotFoundError, ValueError):
        return "an IANA time zone name such as 'Europe/Lisbon'"
    return None


NUM = (int, float)

SCHEMA: dict[str, dict[str, Field]] = {
    "policy": {
        "schema": Field(int, SCHEMA_VERSION, _one_of(SCHEMA_VERSION), "schema version of this file"),
        "name": Field(str, None, None, "short identifier of the policy"),
        "version": Field(str, None, None, "the study's own version label"),
        "description": Field(str, "", None, "one paragraph for participants"),
    },
    "study": {
        "study_id": Field(str, None, None, "the study's identifier, as on the study card"),
        "key_fingerprint": Field(str, "", _hex64_or_empty,
                                 "SHA-256 of the study public key; empty binds to the card's key"),
        "consent_text": Field(str, None, None, "what the participant agrees to"),
        "contact": Field(str, "", None, "who to contact about the study"),
        "default_timezone": Field(str, "UTC", _tz, "IANA zone used when the participant sets none"),
    },
    "schedule": {
        "audio_snippet_seconds": Field(NUM, 3.0, _range(0.5, 60.0)),
        "audio_interval_minutes": Field(NUM, 10.0, _range(1.0, 1440.0)),
        "gps_interval_minutes": Field(NUM, 10.0, _range(0.1, 1440.0)),
        "accel_rate_hz": Field(NUM, 10.0, _range(1.0, 200.0)),
        "accel_burst_seconds": Field(NUM, 60.0, _range(1.0, 86400.0),
                                     "length of each accelerometry recording burst"),
        "accel_interval_minutes": Field(NUM, 10.0, _range(1.0, 1440.0),
                                        "a burst starts this often (duty cycling saves battery)"),
        "mood_prompts_per_day": Field(int, 8, _range(1, 48)),
        "emotions": Field(list, list(DEFAULT_EMOTIONS), _names),
        "mood_scale_min": Field(int, 1, _range(0, 10)),
        "mood_scale_max": Field(int, 7, _range(1, 100)),
        "mood_present_at": Field(int, 5, _range(0, 100),
                                 "a rating at or above this marks the emotion present"),
    },
    "retention": {
        "raw_seconds": Field(NUM, 30.0, _range(1.0, 86400.0),
                             "how long a raw file may exist after it is complete"),
        "settle_seconds": Field(NUM, 0.5, _range(0.0, 60.0),
                                "size and mtime unchanged this long means complete"),
        "feature_days": Field(NUM, 2.0, _range(0.0, 365.0),
                              "features are discarded once coded, and never kept longer than this"),
        "gps_buffer_minutes": Field(NUM, 120.0, _range(5.0, 1440.0),
                                    "validated fixes are buffered at most this long"),
        "quarantine": Field(bool, False, None, "hold rejected files encrypted inside the raw window"),
    },
    "intake": {
        "max_file_bytes": Field(int, 16 * 1024 * 1024, _range(1024, 1024**3)),
        "audio_sr": Field(int, 16000, _one_of(8000, 16000, 22050, 32000, 44100, 48000)),
        "audio_length_tolerance_seconds": Field(NUM, 0.25, _range(0.0, 10.0)),
        "accel_window_seconds": Field(NUM, 10.0, _range(1.0, 600.0)),
        "accel_rate_tolerance": Field(NUM, 0.1, _range(0.0, 1.0),
                                      "allowed relative deviation of the sampling rate"),
        "gps_max_hdop": Field(NUM, 10.0, _range(0.5, 100.0)),
        "gps_max_accuracy_m": Field(NUM, 100.0, _range(1.0, 10000.0)),
        "gps_max_speed_mps": Field(NUM, 70.0, _range(1.0, 350.0),
                                   "a jump implying a faster speed is an outlier"),
    },
    "codebook": {
        "stay_radius_m": Field(NUM, 100.0, _range(5.0, 5000.0), "D: stay-point distance threshold"),
        "stay_min_minutes": Field(NUM, 20.0, _range(1.0, 1440.0), "T: stay-point minimum dwell"),
        "place_radius_m": Field(NUM, 75.0, _range(5.0, 5000.0), "DBSCAN eps on the haversine metric"),
        "place_min_stays": Field(int, 2, _range(1, 100), "DBSCAN min_samples; a place is confirmed"),
        "sound_k_min": Field(int, 3, _range(2, 50)),
        "sound_k_max": Field(int, 8, _range(2, 50)),
        "motion_method": Field(str, "enmo_cutpoints", _one_of("enmo_cutpoints", "kmeans")),
        "motion_k": Field(int, 3, _range(2, 20), "clusters when motion_method = 'kmeans'"),
        "refit_days": Field(NUM, 1.0, _range(0.0, 60.0), "how often the codebook is refitted"),
    },
    "episodes": {
        "mood_window_minutes": Field(NUM, 90.0, _range(1.0, 1440.0),
                                     "a prompt this close to the hour's middle sets its mood nodes"),
    },
    "graph": {
        "nodes": Field(list, list(NODE_KINDS), _subset_of(NODE_KINDS, nonempty=True)),
        "degree_cap": Field(int, 5, _range(1, 1000)),
        "cap_rule": Field(str, "strongest",
                          _one_of("strongest", "arrival", "mutual", "bmatching", "quota", "routine"),
                          "which edges survive the cap; see docs/graph.md"),
        "edge_weight": Field(str, "binary", _one_of("binary", "log_count"),
                             "weight of a kept link: 1, or 1 + ln(count)"),
        "type_quota": Field(int, 2, _range(1, 1000),
                            "cap_rule 'quota': links a node keeps to any one neighbouring kind"),
    },
    "quiz": {
        "min_age_days": Field(NUM, 7.0, _range(0.0, 365.0)),
        "max_age_days": Field(NUM, 21.0, _range(0.0, 365.0)),
        "options": Field(int, 4, _range(2, 10)),
        "foils": Field(str, "uniform", _one_of("uniform", "frequency")),
        "trials_per_session": Field(int, 20, _range(1, 500)),
        "seed": Field(int, 0, _range(0, 2**32 - 1)),
    },
    "model": {
        "folds": Field(int, 5, _range(2, 20)),
        "restarts": Field(int, 2, _range(1, 50)),
    },
    "export": {
        "allow": Field(list, list(NODE_KINDS), _subset_of(NODE_KINDS)),
        "include_edge_list": Field(bool, True),
        "include_model": Field(bool, True),
        "include_quiz_summary": Field(bool, True),
        "cadence_days": Field(NUM, 7.0, _range(0.0, 365.0)),
        "confirm_each": Field(bool, True, None, "ask the participant before each export"),
        "time_granularity": Field(str, "day", _one_of("day", "week")),
        "small_cell_threshold": Field(int, 11, _range(0, 1000)),
        "small_cell_rule": Field(str, "suppress", _one_of("suppress", "merge")),
    },
    "privacy": {
        "dp": Field(bool, False),
        "epsilon_per_export": Field(NUM, 1.0, _range(0.0, 100.0, lo_open=True)),
        "epsilon_total": Field(NUM, 4.0, _range(0.0, 1000.0, lo_open=True)),
        "unit": Field(str, "episode", _one_of("episode", "day")),
    },
}


class Section(Mapping):
    """A read-only view of one section with attribute access (``p.quiz.options``)."""

    def __init__(self, name: str, values: dict):
        object.__setattr__(self, "_name", name)
        object.__setattr__(self, "_values", MappingProxyType(values))

    def __getattr__(self, key):
        try:
            return self._values[key]
        except KeyError:
            raise AttributeError(f"policy section [{self._name}] has no key {key!r}") from None

    def __setattr__(self, key, value):
        raise AttributeError("policies are read-only")

    def __getitem__(self, key):
        return self._values[key]

    def __iter__(self):
        return iter(self._values)

    def __len__(self):
        return len(self._values)

    def __repr__(self):
        return f"Section({self._name!r}, {dict(self._values)!r})"


class Policy:
    """A validated policy.  Sections are attributes: ``policy.retention.raw_seconds``."""

    def __init__(self, resolved: dict[str, dict], source: str = "<memory>"):
        self._resolved = resolved
        self.source = source
        for name, values in resolved.items():
            setattr(self, name, Section(name, values))

    # -- identity -------------------------------------------------------
    def canonical_bytes(self) -> bytes:
        return canonical.dumps(self._resolved)

    @property
    def fingerprint(self) -> str:
        return hashlib.sha256(self.canonical_bytes()).hexdigest()

    def as_dict(self) -> dict:
        return json.loads(self.canonical_bytes())

    # -- derived helpers ------------------------------------------------
    def exported_kinds(self) -> list[str]:
        """Node kinds that are both in the graph and on the export allowlist."""
        return [k for k in self.graph.nodes if k in self.export.allow]

    def __repr__(self):
        return f"Policy({self.policy.name!r}, version={self.policy.version!r}, fp={self.fingerprint[:12]})"


# Kept for branches written before agent/canonical.py; new code imports agent.canonical.dumps.
canonical_json = canonical.dumps


def _type_ok(value, kind) -> bool:
    kinds = kind if isinstance(kind, tuple) else (kind,)
    if isinstance(value, bool) and bool not in kinds:
        return False  # TOML booleans are not numbers here
    return isinstance(value, kinds)


def _type_name(kind) -> str:
    kinds = kind if isinstance(kind, tuple) else (kind,)
    names = {int: "an integer", float: "a number", str: "a string", bool: "true or false",
             list: "a list"}
    if set(kinds) == {int, float}:
        return "a number"
    return " or ".join(names.get(k, k.__name__) for k in kinds)


def validate(raw: dict, source: str = "<memory>") -> Policy:
    """Validate a parsed TOML document and return the resolved :class:`Policy`."""
    if not isinstance(raw, dict):
        raise PolicyError(source, "<document>", "expected a TOML table at the top level")
    # The schema version is checked before anything else, so that a future
    # file is refused as such rather than as a pile of unknown keys.
    head = raw.get("policy")
    if not isinstance(head, dict):
        raise PolicyError(source, "policy", "missing section [policy] (it holds schema, name and version)")
    if "schema" not in head:
        raise PolicyError(source, "policy.schema", f"missing; this version of lethe reads schema = {SCHEMA_VERSION}")
    if head["schema"] != SCHEMA_VERSION or isinstance(head["schema"], bool):
        raise PolicyError(source, "policy.schema",
                          f"schema {head['schema']!r} is not supported; this version of lethe reads "
                          f"schema = {SCHEMA_VERSION}")
    for section in raw:
        if section not in SCHEMA:
            raise PolicyError(source, section,
                              f"unknown section [{section}]; allowed sections: {', '.join(SCHEMA)}")
    resolved: dict[str, dict] = {}
    for section, fields in SCHEMA.items():
        given = raw.get(section, {})
        if not isinstance(given, dict):
            raise PolicyError(source, section, f"expected a table [{section}], got {type(given).__name__}")
        for key in given:
            if key not in fields:
                near = _nearest(key, fields)
                hint = f" (did you mean {near!r}?)" if near else ""
                raise PolicyError(source, f"{section}.{key}",
                                  f"unknown key{hint}; allowed keys in [{section}]: {', '.join(fields)}")
        out = {}
        for key, field in fields.items():
            dotted = f"{section}.{key}"
            if key in given:
                value = given[key]
            elif field.default is None:
                raise PolicyError(source, dotted, f"required key is missing ({field.help or _type_name(field.kind)})")
            else:
                value = field.default
            if not _type_ok(value, field.kind):
                raise PolicyError(source, dotted,
                                  f"value {value!r} has the wrong type: expected {_type_name(field.kind)}")
            if isinstance(value, list) and any(isinstance(x, (dict, list)) for x in value):
                raise PolicyError(source, dotted, f"value {value!r}: expected a flat list of names")
            if field.kind == NUM:
                value = float(value)
            if field.check is not None:
                problem = field.check(value)
                if problem:
                    raise PolicyError(source, dotted, f"value {value!r} is out of range: expected {problem}")
            out[key] = list(value) if isinstance(value, list) else value
        resolved[section] = out
    _cross_checks(resolved, source)
    return Policy(resolved, source)


def _cross_checks(p: dict, source: str) -> None:
    s, q, c = p["schedule"], p["quiz"], p["codebook"]
    if s["mood_scale_min"] >= s["mood_scale_max"]:
        raise PolicyError(source, "schedule.mood_scale_max",
                          f"value {s['mood_scale_max']} must be greater than mood_scale_min = {s['mood_scale_min']}")
    if not s["mood_scale_min"] <= s["mood_present_at"] <= s["mood_scale_max"]:
        raise PolicyError(source, "schedule.mood_present_at",
                          f"value {s['mood_present_at']} must lie within the mood scale "
                          f"[{s['mood_scale_min']}, {s['mood_scale_max']}]")
    if q["min_age_days"] >= q["max_age_days"]:
        raise PolicyError(source, "quiz.max_age_days",
                          f"value {q['max_age_days']} must be greater than min_age_days = {q['min_age_days']}")
    if c["sound_k_min"] > c["sound_k_max"]:
        raise PolicyError(source, "codebook.sound_k_max",
                          f"value {c['sound_k_max']} must be at least sound_k_min = {c['sound_k_min']}")
    if s["accel_burst_seconds"] > s["accel_interval_minutes"] * 60:
        raise PolicyError(source, "schedule.accel_burst_seconds",
                          f"value {s['accel_burst_seconds']} is longer than the burst interval "
                          f"({s['accel_interval_minutes']} minutes)")
    if p["retention"]["settle_seconds"] >= p["retention"]["raw_seconds"]:
        raise PolicyError(source, "retention.settle_seconds",
                          f"value {p['retention']['settle_seconds']} must be shorter than raw_seconds = "
                          f"{p['retention']['raw_seconds']}, or no file could be destroyed in time")
    if p["privacy"]["dp"] and p["privacy"]["epsilon_per_export"] > p["privacy"]["epsilon_total"]:
        raise PolicyError(source, "privacy.epsilon_per_export",
                          f"value {p['privacy']['epsilon_per_export']} exceeds epsilon_total = "
                          f"{p['privacy']['epsilon_total']}")
    if "place" not in p["graph"]["nodes"]:
        raise PolicyError(source, "graph.nodes", "the memory model needs 'place' among the node kinds")
    for k in ("hour", "weekday", "week"):
        if k not in p["graph"]["nodes"]:
            raise PolicyError(source, "graph.nodes", f"the memory test's time cue needs {k!r} among the node kinds")


def _nearest(key: str, fields) -> str | None:
    import difflib

    m = difflib.get_close_matches(key, list(fields), n=1, cutoff=0.75)
    return m[0] if m else None


def read_toml(path, error=PolicyError, what: str = "policy") -> dict:
    """Parse a TOML file; ``error(path, key, message)`` is raised naming the file.

    Shared by every TOML format of ours (policies, board limits), so that a
    missing file, a non-UTF-8 file and a syntax error read the same everywhere.
    """
    path = Path(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise error(path, "<file>", f"no such {what} file") from None
    except OSError as e:
        raise error(path, "<file>", f"cannot read: {e.strerror}") from None
    try:
        return tomllib.loads(data.decode("utf-8"))
    except UnicodeDecodeError as e:
        raise error(path, "<file>", f"not UTF-8 text (byte {e.start})") from None
    except tomllib.TOMLDecodeError as e:
        raise error(path, "<syntax>", f"not valid TOML: {e}") from None


def load_policy(path) -> Policy:
    """Read and validate a policy file.  Errors name the file and the key."""
    return validate(read_toml(path), str(Path(path)))


def policy_from_dict(raw: dict, source: str = "<memory>") -> Policy:
    return validate(raw, source)


def bundled_policy_path(name: str = "default") -> Path:
    """Path of a policy shipped in ``policies/`` (``default`` or ``strict``)."""
    here = Path(__file__).resolve().parent
    for base in (here.parent / "policies", here / "data" / "policies"):
        p = base / f"{name}.toml"
        if p.exists():
            return p
    raise PolicyError(f"policies/{name}.toml", "<file>", "bundled policy not found")
