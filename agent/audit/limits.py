"""An ethics board's limits for a policy, and the rule-by-rule check.

The limits file is our own small TOML format, versioned like the policy::

    [limits]
    schema = 1
    name = "Example board limits"
    max_raw_seconds = 30
    forbidden_export_kinds = ["sound"]
    require_dp = true

Every rule key is optional (an absent rule is not checked) but at least one must
be given.  The format is the JSON Schema ``agent/contracts/schemas/board-limits.json``
(each rule's policy key, kind, unit and words are annotations there, read into
:data:`RULES`).  Validation is as strict as the policy's: unknown keys (with a
suggestion), wrong types, booleans for numbers and out-of-range values are
errors naming the file and the key.  The rules are also listed in ``docs/audit.md``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from .. import contracts
from ..errors import PolicyError
from ..policy import Policy
from .diff import fmt_value

LIMITS_SCHEMA: int = contracts.schema("board-limits")["properties"]["limits"]["properties"]["schema"]["const"]


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


def _rules_from_schema() -> tuple[Rule, ...]:
    props = contracts.schema("board-limits")["properties"]["limits"]["properties"]
    return tuple(Rule(key, p["x-lethe-rule"]["kind"], p["x-lethe-rule"]["policy_key"], p.get("x-lethe-unit", ""),
                      p["description"]) for key, p in props.items() if "x-lethe-rule" in p)


# The rules, in file order, read from agent/contracts/schemas/board-limits.json.
RULES: tuple[Rule, ...] = _rules_from_schema()
RULES_BY_KEY = {r.key: r for r in RULES}


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


def validate_limits(raw: dict, source: str = "<memory>") -> Limits:
    """Validate a parsed limits document against ``board-limits.json``, then the rules the schema cannot say."""
    if not isinstance(raw, dict) or not isinstance(raw.get("limits"), dict):
        raise LimitsError(source, "limits", "a limits file has exactly one table, [limits]")
    t = raw["limits"]
    if "schema" not in t:
        raise LimitsError(source, "limits.schema", f"missing; this version of lethe reads schema = {LIMITS_SCHEMA}")
    if isinstance(t["schema"], bool) or t["schema"] != LIMITS_SCHEMA:
        raise LimitsError(source, "limits.schema", f"schema {t['schema']!r} is not supported; this version of "
                                                   f"lethe reads schema = {LIMITS_SCHEMA}")
    contracts.validate("board-limits", raw, source, syntax="toml", error=LimitsError)
    values = {}
    for key, v in t.items():
        rule = RULES_BY_KEY.get(key)
        if rule is None:
            continue
        values[key] = float(v) if rule.kind in ("max", "min") else (list(v) if isinstance(v, list) else v)
    if not values:
        raise LimitsError(source, "limits", f"no rule given; set at least one of: {', '.join(RULES_BY_KEY)}")
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
