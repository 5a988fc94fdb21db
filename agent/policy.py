"""The study's retention and export policy: schema, validation and fingerprint.

A policy is a TOML file (read with :mod:`tomllib`) in our own versioned schema:
the JSON Schema ``agent/contracts/schemas/policy.json``, documented in
``docs/policy.md`` (generated from it).  Loading is strict: an unknown section
or key, a wrong type or an out-of-range value raises
:class:`~agent.errors.PolicyError` naming the file, the dotted key, the value and
what is allowed.  A typo in an approved policy must never be ignored silently.
Rules relating two keys (:func:`_cross_checks`) follow the schema.  The loaded
policy is a :class:`Policy` of frozen, typed sections (:mod:`agent.policy_types`).

The fingerprint is the SHA-256 of a canonical JSON serialisation of the
*resolved* policy (defaults filled in, keys sorted, no whitespace), so it is
stable across key order, comments and formatting and changes whenever any
effective value changes.
"""

from __future__ import annotations

import copy
import hashlib
import tomllib
from dataclasses import dataclass
from pathlib import Path
from collections.abc import Mapping
from types import MappingProxyType
from typing import Any

from . import canonical, contracts
from . import policy_types as types
from .errors import PolicyError




NUM = (int, float)

_KINDS: dict[str, Any] = {"number": NUM, "integer": int, "string": str, "boolean": bool, "array": list}


@dataclass(frozen=True)
class Field:
    """One policy key as the schema declares it (read from ``policy.json``).

    Attributes
    ----------
    kind : type or tuple of types
        Python type(s) of the value (``NUM`` for a number).
    default : object
        The default, or None for a required key.
    spec : mapping
        The key's JSON Schema (ranges, choices, patterns, annotations).
    help : str
        The key's description.
    """

    kind: type | tuple[type, ...]
    default: Any
    spec: Mapping[str, Any]
    help: str = ""


def _schema_fields() -> dict[str, dict[str, Field]]:
    doc = contracts.schema("policy")
    out: dict[str, dict[str, Field]] = {}
    for section, sub in doc["properties"].items():
        out[section] = {key: Field(_KINDS[spec["type"]], spec.get("default"), MappingProxyType(spec),
                                   spec.get("description", ""))
                        for key, spec in sub["properties"].items()}
    return out


# {section: {key: Field}} in document order, derived from the JSON Schema.
SCHEMA: dict[str, dict[str, Field]] = _schema_fields()
SCHEMA_VERSION: int = SCHEMA["policy"]["schema"].spec["const"]
NODE_KINDS: tuple[str, ...] = tuple(SCHEMA["graph"]["nodes"].spec["items"]["enum"])
# The eleven discrete emotions rated at each prompt in the default study (the
# schema's default).  The list is common practice in experience-sampling work,
# no single published source.
DEFAULT_EMOTIONS: tuple[str, ...] = tuple(SCHEMA["schedule"]["emotions"].default)


class Policy:
    """A validated policy.  Sections are frozen dataclasses: ``policy.retention.raw_seconds``."""

    _resolved: dict[str, dict]
    source: str
    policy: types.PolicySection
    study: types.StudySection
    schedule: types.ScheduleSection
    retention: types.RetentionSection
    intake: types.IntakeSection
    codebook: types.CodebookSection
    episodes: types.EpisodesSection
    graph: types.GraphSection
    quiz: types.QuizSection
    model: types.ModelSection
    export: types.ExportSection
    privacy: types.PrivacySection

    def __init__(self, resolved: dict[str, dict], source: str = "<memory>"):
        object.__setattr__(self, "_resolved", resolved)
        object.__setattr__(self, "source", source)
        for name, values in resolved.items():
            frozen = {k: tuple(v) if isinstance(v, list) else v for k, v in values.items()}
            object.__setattr__(self, name, types.SECTION_TYPES[name](**frozen))

    def __setattr__(self, key, value):
        raise AttributeError("policies are read-only")

    # -- identity -------------------------------------------------------
    def canonical_bytes(self) -> bytes:
        return canonical.dumps(self._resolved)

    @property
    def fingerprint(self) -> str:
        return hashlib.sha256(self.canonical_bytes()).hexdigest()

    def as_dict(self) -> dict:
        """The resolved policy as plain data (a deep copy): ``{section: {key: value}}``."""
        return copy.deepcopy(self._resolved)

    # -- derived helpers ------------------------------------------------
    def exported_kinds(self) -> list[str]:
        """Node kinds that are both in the graph and on the export allowlist."""
        return [k for k in self.graph.nodes if k in self.export.allow]

    def __repr__(self):
        return f"Policy({self.policy.name!r}, version={self.policy.version!r}, fp={self.fingerprint[:12]})"


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
    filled = contracts.apply_defaults("policy", raw)
    contracts.validate("policy", filled, source, syntax="toml", error=PolicyError)
    resolved: dict[str, dict] = {}
    for section, fields in SCHEMA.items():
        out = {}
        for key, field in fields.items():
            value = filled[section][key]
            if field.kind == NUM:
                value = float(value)
            elif field.kind is int:
                value = int(value)  # JSON Schema's integer admits 8.0
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
