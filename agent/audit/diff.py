"""What changed between two policy versions, in plain words.

Each changed key becomes one sentence such as "Raw files may now exist for
10 s instead of 30 s (stricter)".  *Stricter* means less is collected, kept or
sent (the direction for each key is in :data:`agent.audit.schema_doc.KEY_INFO`);
keys that do not bear on privacy carry no verdict.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

from ..policy import SCHEMA, Policy
from ..policy_summary import KIND_SHORT, fmt_number
from .schema_doc import KEY_INFO

UNIT_WORDS = {"days": ("day", "days")}


def fmt_value(value, unit: str = "") -> str:
    """A value with its unit: ``10 s``, ``2 days``, ``on``/``off``, ``"week"``."""
    if isinstance(value, bool):
        return "on" if value else "off"
    if isinstance(value, (int, float)):
        if unit in UNIT_WORDS:
            one, many = UNIT_WORDS[unit]
            return f"{fmt_number(value)} {one if float(value) == 1 else many}"
        return f"{fmt_number(value)} {unit}".strip()
    if isinstance(value, list):
        return "[" + ", ".join(str(v) for v in value) + "]"
    return f'"{value}"'


@dataclass
class Change:
    """One changed key: dotted name, both values, the sentence and its verdict."""

    key: str
    old: object
    new: object
    words: str
    verdict: str | None = None  # "stricter", "looser" or None

    def as_dict(self) -> dict:
        return {"key": self.key, "old": self.old, "new": self.new, "words": self.words,
                "verdict": self.verdict}


@dataclass
class PolicyDiff:
    """All changes from ``old`` to ``new`` with both fingerprints."""

    old_source: str
    new_source: str
    old_fingerprint: str
    new_fingerprint: str
    changes: list[Change] = field(default_factory=list)

    @property
    def identical(self) -> bool:
        return self.old_fingerprint == self.new_fingerprint

    def text(self) -> str:
        lines = [f"Old: {self.old_source}", f"     fingerprint {self.old_fingerprint}",
                 f"New: {self.new_source}", f"     fingerprint {self.new_fingerprint}", ""]
        if self.identical:
            lines.append("The two policies are identical (same fingerprint).")
        else:
            n_s = sum(c.verdict == "stricter" for c in self.changes)
            n_l = sum(c.verdict == "looser" for c in self.changes)
            lines.append(f"{len(self.changes)} change(s): {n_s} stricter, {n_l} looser, "
                         f"{len(self.changes) - n_s - n_l} without bearing on privacy.")
            for c in self.changes:
                lines.append(f"  - {c.words}")
        return "\n".join(lines) + "\n"

    def as_dict(self) -> dict:
        return {"old": {"source": self.old_source, "fingerprint": self.old_fingerprint},
                "new": {"source": self.new_source, "fingerprint": self.new_fingerprint},
                "identical": self.identical,
                "changes": [c.as_dict() for c in self.changes]}


def _verdict(stricter, old, new) -> str | None:
    if stricter is None or old == new:
        return None
    if stricter == "lower":
        return "stricter" if new < old else "looser"
    if stricter == "higher":
        return "stricter" if new > old else "looser"
    if stricter in ("true", "false"):
        good = stricter == "true"
        return "stricter" if new == good else "looser"
    if stricter == "fewer":
        o, n = set(old), set(new)
        if n < o:
            return "stricter"
        if n > o:
            return "looser"
        return "mixed"
    if isinstance(stricter, tuple):
        return "stricter" if stricter.index(new) > stricter.index(old) else "looser"
    return None


def _with_verdict(words: str, verdict: str | None) -> str:
    if verdict in ("stricter", "looser"):
        return f"{words} ({verdict})"
    if verdict == "mixed":
        return f"{words} (some stricter, some looser)"
    return words


def _export_allow(old: list, new: list) -> tuple[str, str | None]:
    added = [k for k in new if k not in old]
    removed = [k for k in old if k not in new]
    parts = []
    for k in removed:
        parts.append(f"{KIND_SHORT.get(k, k).capitalize()} will no longer be exported")
    for k in added:
        parts.append(f"{KIND_SHORT.get(k, k).capitalize()} will now be exported")
    if not parts:
        return f"The export allowlist is reordered: {fmt_value(new)} instead of {fmt_value(old)}", None
    return "; ".join(parts), _verdict("fewer", old, new)


def describe_change(key: str, old, new, *, dp_on: bool = True) -> Change:
    """The sentence for one key's change."""
    info = KEY_INFO.get(key)
    if key == "export.allow":
        words, verdict = _export_allow(old, new)
        return Change(key, old, new, _with_verdict(words, verdict), verdict)
    if info is None:  # a key added to the schema after this table: still reported
        return Change(key, old, new, f"{key} is now {fmt_value(new)} instead of {fmt_value(old)}")
    if isinstance(new, str) and (len(new) > 40 or len(str(old)) > 40):
        subject = re.sub(r" (is|are) now$", "", info.phrase)
        words = f"{subject} changed (text too long to quote; compare the files)"
    else:
        show = str if isinstance(info.stricter, tuple) else (lambda v: fmt_value(v, info.unit))
        words = f"{info.phrase} {show(new)} instead of {show(old)}"
    verdict = _verdict(info.stricter, old, new)
    if key.startswith("privacy.epsilon") and not dp_on:
        words += " (no effect while differential privacy is off)"
        verdict = None
    return Change(key, old, new, _with_verdict(words, verdict), verdict)


def diff_policies(old: Policy, new: Policy) -> PolicyDiff:
    """Compare two validated policies key by key, in schema order.

    Parameters
    ----------
    old, new : agent.policy.Policy

    Returns
    -------
    PolicyDiff
    """
    a, b = old.as_dict(), new.as_dict()
    out = PolicyDiff(old.source, new.source, old.fingerprint, new.fingerprint)
    dp_on = bool(a["privacy"]["dp"] or b["privacy"]["dp"])
    for section, fields in SCHEMA.items():
        for key in fields:
            va, vb = a[section][key], b[section][key]
            if va != vb:
                out.changes.append(describe_change(f"{section}.{key}", va, vb, dp_on=dp_on))
    return out
