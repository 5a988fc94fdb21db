"""An ethics board's limits for a policy, and the rule-by-rule check.

The limits file is our own small TOML format, versioned like the policy::

    [limits]
    schema = 1
    name = "Example board limits"
    max_raw_seconds = 30
    forbidden_export_kinds = ["sound"]
    require_dp = true

Every rule key is optional (an absent rule is not checked) but at least one must
be given.  Validation is as strict as the policy's: unknown keys (with a
suggestion), wrong types, booleans for numbers and out-of-range values are
errors naming the file and the key.  The rules are listed in :data:`RULES` and in
``docs/audit.md``.
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import PolicyError
from ..policy import NODE_KINDS, Policy
from .diff import fmt_value

LIMITS_SCHEMA = 1
GRANULARITIES = ("day", "week")


class LimitsError(PolicyError):
    """A board limits file that fails validation (exit code 3, like a bad policy)."""


@dataclass(frozen=True)
class Rule:
    """One board rule.

    Attributes
    ----------
    key : str
        Key in the limits file.
    kind : str
        ``"max"`` (policy value ≤ limit), ``"min"`` (≥ limit), ``"require"``
        (a true limit demands a true policy value), ``"forbid"`` (a true limit
        demands a false policy value), ``"none_of"`` (no exported kind in the
        list), ``"one_of"`` (policy value in the list).
    policy_key : str
        The dotted policy key the rule reads.
    unit : str
        Unit for printing, as in :mod:`agent.audit.schema_doc`.
    words : str
        What the rule asks, in plain words.
    """

    key: str
    kind: str
    policy_key: str
    unit: str
    words: str


RULES: tuple[Rule, ...] = (
    Rule("max_raw_seconds", "max", "retention.raw_seconds", "s",
         "Raw files may exist at most this long after they are complete."),
    Rule("max_feature_days", "max", "retention.feature_days", "days",
         "Features may be kept at most this long."),
    Rule("max_gps_buffer_minutes", "max", "retention.gps_buffer_minutes", "min",
         "Location fixes may be buffered at most this long."),
    Rule("forbid_quarantine", "forbid", "retention.quarantine", "",
         "Rejected files must be destroyed at once, not held in quarantine."),
    Rule("max_audio_snippet_seconds", "max", "schedule.audio_snippet_seconds", "s",
         "Sound snippets may be at most this long."),
    Rule("min_audio_interval_minutes", "min", "schedule.audio_interval_minutes", "min",
         "Sound snippets may be taken at most this often."),
    Rule("min_gps_interval_minutes", "min", "schedule.gps_interval_minutes", "min",
         "Location fixes may be taken at most this often."),
    Rule("max_mood_prompts_per_day", "max", "schedule.mood_prompts_per_day", "",
         "At most this many mood prompts a day."),
    Rule("forbidden_export_kinds", "none_of", "export.allow", "",
         "These node kinds must never leave the device."),
    Rule("allowed_time_granularity", "one_of", "export.time_granularity", "",
         "Exported dates may be no finer than these."),
    Rule("min_small_cell_threshold", "min", "export.small_cell_threshold", "",
         "Counts below at least this threshold must be withheld."),
    Rule("require_confirm_each_export", "require", "export.confirm_each", "",
         "The participant must confirm each export."),
    Rule("require_dp", "require", "privacy.dp", "",
         "Exports must carry differential-privacy noise."),
    Rule("max_epsilon_per_export", "max", "privacy.epsilon_per_export", "",
         "Each export may spend at most this much epsilon."),
    Rule("max_epsilon_total", "max", "privacy.epsilon_total", "",
         "The whole study may spend at most this much epsilon."),
    Rule("max_quiz_age_days", "max", "quiz.max_age_days", "days",
         "Quiz trials may ask about days at most this old (episodes must be kept that long)."),
)
RULES_BY_KEY = {r.key: r for r in RULES}
HEADER_KEYS = ("schema", "name", "board", "notes")


@dataclass
class Limits:
    """A validated limits file: its rule values and where it came from."""

    values: dict
    name: str = ""
    board: str = ""
    source: str = "<memory>"

    def rules(self) -> list[Rule]:
        return [r for r in RULES if r.key in self.values]


@dataclass
class RuleResult:
    rule: Rule
    ok: bool
    policy_value: object
    limit: object
    message: str

    def as_dict(self) -> dict:
        return {"rule": self.rule.key, "ok": self.ok, "policy_key": self.rule.policy_key,
                "policy_value": self.policy_value, "limit": self.limit, "message": self.message}


@dataclass
class LimitsReport:
    limits: Limits
    policy_source: str
    policy_fingerprint: str
    results: list[RuleResult] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return all(r.ok for r in self.results)

    @property
    def failures(self) -> list[RuleResult]:
        return [r for r in self.results if not r.ok]

    def text(self) -> str:
        title = self.limits.name or Path(self.limits.source).name
        lines = [f"Board limits: {title} ({self.limits.source})",
                 f"Policy: {self.policy_source}", f"        fingerprint {self.policy_fingerprint}", ""]
        w = max(len(r.rule.key) for r in self.results)
        for r in self.results:
            lines.append(f"{'PASS' if r.ok else 'FAIL'}  {r.rule.key:<{w}}  {r.message}")
        lines.append("")
        n_fail = len(self.failures)
        lines.append(f"{len(self.results)} rule(s) checked: {len(self.results) - n_fail} passed, "
                     f"{n_fail} failed." + ("" if n_fail else " The policy is within the board's limits."))
        return "\n".join(lines) + "\n"

    def as_dict(self) -> dict:
        return {"limits": {"source": self.limits.source, "name": self.limits.name,
                           "board": self.limits.board},
                "policy": {"source": self.policy_source, "fingerprint": self.policy_fingerprint},
                "ok": self.ok, "results": [r.as_dict() for r in self.results]}


def _bad(source, key, msg):
    raise LimitsError(source, f"limits.{key}" if key else "limits", msg)


def validate_limits(raw: dict, source: str = "<memory>") -> Limits:
    """Validate a parsed limits document."""
    if not isinstance(raw, dict) or set(raw) != {"limits"} or not isinstance(raw.get("limits"), dict):
        extra = sorted(set(raw) - {"limits"}) if isinstance(raw, dict) else []
        raise LimitsError(source, extra[0] if extra else "limits",
                          "a limits file has exactly one table, [limits]"
                          + (f"; unknown section [{extra[0]}]" if extra else ""))
    t = raw["limits"]
    if "schema" not in t:
        _bad(source, "schema", f"missing; this version of lethe reads schema = {LIMITS_SCHEMA}")
    if isinstance(t["schema"], bool) or t["schema"] != LIMITS_SCHEMA:
        _bad(source, "schema", f"schema {t['schema']!r} is not supported; this version of lethe reads "
                               f"schema = {LIMITS_SCHEMA}")
    allowed = list(HEADER_KEYS) + list(RULES_BY_KEY)
    for key in t:
        if key not in allowed:
            near = difflib.get_close_matches(key, allowed, n=1, cutoff=0.75)
            hint = f" (did you mean {near[0]!r}?)" if near else ""
            _bad(source, key, f"unknown key{hint}; allowed keys: {', '.join(allowed)}")
    for key in ("name", "board", "notes"):
        if key in t and not isinstance(t[key], str):
            _bad(source, key, f"value {t[key]!r} has the wrong type: expected a string")
    values = {}
    for key, v in t.items():
        rule = RULES_BY_KEY.get(key)
        if rule is None:
            continue
        if rule.kind in ("max", "min"):
            if isinstance(v, bool) or not isinstance(v, (int, float)):
                _bad(source, key, f"value {v!r} has the wrong type: expected a number")
            if not math.isfinite(v):
                _bad(source, key, f"value {v!r} is out of range: expected a finite number")
            if key.startswith("max_epsilon"):
                if v <= 0:
                    _bad(source, key, f"value {v!r} is out of range: expected > 0")
            elif v < 0:
                _bad(source, key, f"value {v!r} is out of range: expected >= 0")
            v = float(v)
        elif rule.kind in ("require", "forbid"):
            if not isinstance(v, bool):
                _bad(source, key, f"value {v!r} has the wrong type: expected true or false")
        else:
            choices = NODE_KINDS if rule.kind == "none_of" else GRANULARITIES
            if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
                _bad(source, key, f"value {v!r} has the wrong type: expected a list of names")
            unknown = [x for x in v if x not in choices]
            if unknown:
                _bad(source, key, f"value {v!r} is out of range: expected names from {list(choices)} "
                                  f"(unknown: {unknown})")
            if len(set(v)) != len(v):
                _bad(source, key, f"value {v!r}: expected a list without repeats")
            if rule.kind == "one_of" and not v:
                _bad(source, key, "value [] would allow no granularity: expected a non-empty list")
            v = list(v)
        values[key] = v
    if not values:
        _bad(source, "", f"no rule given; set at least one of: {', '.join(RULES_BY_KEY)}")
    return Limits(values, t.get("name", ""), t.get("board", ""), source)


def load_limits(path) -> Limits:
    """Read and validate a board limits file; errors name the file and the key."""
    from ..policy import read_toml

    return validate_limits(read_toml(path, LimitsError, "limits"), str(Path(path)))


def _policy_value(policy: Policy, dotted: str):
    section, key = dotted.split(".")
    return policy.as_dict()[section][key]


def check_rule(rule: Rule, limit, policy: Policy) -> RuleResult:
    """Check one rule; the message names the policy key, its value and the limit."""
    pv = _policy_value(policy, rule.policy_key)
    shown = f"{rule.policy_key} = {fmt_value(pv, rule.unit)}"
    if rule.kind in ("max", "min"):
        if rule.key.startswith("max_epsilon") and not policy.privacy.dp:
            return RuleResult(rule, False, pv, limit,
                              f"privacy.dp = off, so exports have no epsilon bound; limit ≤ {fmt_value(limit)}")
        ok = pv <= limit if rule.kind == "max" else pv >= limit
        sign = "≤" if rule.kind == "max" else "≥"
        return RuleResult(rule, ok, pv, limit, f"{shown}; limit {sign} {fmt_value(limit, rule.unit)}")
    if rule.kind == "require":
        ok = bool(pv) or not limit
        need = "required" if limit else "not required"
        return RuleResult(rule, ok, pv, limit, f"{shown}; {need} by the board")
    if rule.kind == "forbid":
        ok = not (limit and pv)
        need = "must be off" if limit else "allowed"
        return RuleResult(rule, ok, pv, limit, f"{shown}; {need} by the board")
    if rule.kind == "none_of":
        exported = policy.exported_kinds()
        bad = [k for k in exported if k in limit]
        lim = "never " + ", ".join(limit) if limit else "no kind forbidden"
        if bad:
            return RuleResult(rule, False, exported, limit,
                              f"exported kinds include {', '.join(bad)}; limit: {lim}")
        return RuleResult(rule, True, exported, limit,
                          f"exported kinds = [{', '.join(exported)}]; limit: {lim}")
    if rule.kind == "one_of":
        ok = pv in limit
        return RuleResult(rule, ok, pv, limit, f"{shown}; allowed: {', '.join(limit)}")
    raise ValueError(f"unknown rule kind {rule.kind!r}")  # pragma: no cover


def check_limits(policy: Policy, limits: Limits) -> LimitsReport:
    """Check ``policy`` against every rule the limits file sets, in :data:`RULES` order."""
    report = LimitsReport(limits, policy.source, policy.fingerprint)
    for rule in limits.rules():
        report.results.append(check_rule(rule, limits.values[rule.key], policy))
    return report
