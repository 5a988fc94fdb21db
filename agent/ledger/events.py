"""Ledger entries: the event schema, field checks, entry hashes and the entry shape.

See :mod:`agent.ledger` for the terminology and ``docs/ledger.md`` for the format.
"""

from __future__ import annotations

import hashlib
import json
import math
import re

ENTRY_VERSION = 1
ZERO_HASH = "0" * 64
RESERVED = ("v", "seq", "prev", "t", "event", "hash", "sig")
KINDS = ("audio", "gps", "accel", "mood", "unknown")

HEX64 = re.compile(r"[0-9a-f]{64}\Z")
_SIG128 = re.compile(r"[0-9a-f]{128}\Z")
_ITEM = re.compile(r"[0-9a-f]{16,64}\Z")
_CODE = re.compile(r"[a-z0-9_]{1,64}\Z")
_LABEL = re.compile(r"[A-Za-z0-9._:+-]{1,64}\Z")


# -- field types ---------------------------------------------------------------
# Each returns (value, None) or (None, "what was expected").

def _number(v):
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        try:
            import numpy as np  # numpy scalars from the feature code are fine
            if isinstance(v, (np.integer, np.floating)):
                v = v.item()
            else:
                return None, "a number"
        except ImportError:  # pragma: no cover
            return None, "a number"
    v = float(v)
    if not math.isfinite(v):
        return None, "a finite number"
    return v, None


def _time(v):
    v, err = _number(v)
    if err:
        return None, err
    if v < 0:
        return None, "Unix seconds (>= 0)"
    return v, None


def _opt_time(v):
    return (None, None) if v is None else _time(v)


def _seconds(v):
    v, err = _number(v)
    return (None, err) if err else (v, None)


def _count(v):
    if isinstance(v, bool):
        return None, "a non-negative integer"
    try:
        import operator
        v = operator.index(v)
    except TypeError:
        return None, "a non-negative integer"
    if v < 0:
        return None, "a non-negative integer"
    return int(v), None


def _pattern(rx, what):
    def check(v):
        if isinstance(v, str) and rx.match(v):
            return v, None
        return None, what
    return check


_item = _pattern(_ITEM, "an item id (16 to 64 lowercase hex digits of a keyed content MAC)")
_hex64 = _pattern(HEX64, "64 lowercase hex digits")
_code = _pattern(_CODE, "a short code (lowercase letters, digits, underscore; at most 64)")
_label = _pattern(_LABEL, "a short label (letters, digits, . _ : + -; at most 64)")


def _kind(v):
    return (v, None) if v in KINDS else (None, "one of " + ", ".join(KINDS))


def _counts(v):
    if not isinstance(v, dict):
        return None, "a mapping of short codes to counts"
    out = {}
    for k, n in v.items():
        if not isinstance(k, str) or not _CODE.match(k):
            return None, "a mapping of short codes to counts"
        n, err = _count(n)
        if err:
            return None, "a mapping of short codes to counts"
        out[k] = n
    return out, None


_CONTENT = {"item": _item, "kind": _kind}

# event -> (required fields, optional fields)
EVENT_FIELDS: dict[str, tuple[dict, dict]] = {
    "agent_start": ({}, {"version": _label, "mode": _code}),
    "agent_stop": ({}, {"reason": _code}),
    "policy": ({"fingerprint": _hex64}, {"name": _label, "version": _label}),
    "received": ({**_CONTENT, "bytes": _count, "complete_at": _time}, {}),
    "featurised": ({**_CONTENT, "rows": _count}, {}),
    "rejected": ({**_CONTENT, "reason": _code}, {"bytes": _count, "complete_at": _time}),
    "destroyed": ({**_CONTENT, "complete_at": _time, "exposure_s": _seconds}, {"bytes": _count}),
    "paused": ({"until": _opt_time}, {"reason": _code}),
    "resumed": ({}, {}),
    "coded": ({"counts": _counts}, {}),
    "exported": ({"bundle_seq": _count, "digest": _hex64}, {"log_size": _count}),
    "withdrawn": ({}, {"scope": _code}),
    "repaired": ({"dropped_bytes": _count}, {}),
    "alarm": ({"check": _code, "lines": _count}, {}),
}
LEDGER_EVENTS = tuple(EVENT_FIELDS)


def check_fields(event, fields: dict) -> tuple[dict, list[str]]:
    """Validate an event's fields; returns (normalised fields, problems)."""
    if event not in EVENT_FIELDS:
        return {}, [f"unknown event {event!r} (known: {', '.join(LEDGER_EVENTS)})"]
    required, optional = EVENT_FIELDS[event]
    out, problems = {}, []
    for name in fields:
        if name in RESERVED:
            problems.append(f"field {name!r} is set by the ledger itself")
        elif name not in required and name not in optional:
            allowed = list(required) + list(optional)
            problems.append(f"event {event!r} has no field {name!r} "
                            f"(allowed: {', '.join(allowed) if allowed else 'none'})")
    for name, check in {**required, **optional}.items():
        if name not in fields:
            if name in required:
                problems.append(f"event {event!r} lacks field {name!r}")
            continue
        value, err = check(fields[name])
        if err:
            problems.append(f"event {event!r}: field {name!r} = {fields[name]!r} is not {err}")
        else:
            out[name] = value
    return out, problems


def entry_hash(entry: dict) -> str:
    """SHA-256 hex of the canonical JSON of ``entry`` without ``hash`` and ``sig``."""
    body = {k: v for k, v in entry.items() if k not in ("hash", "sig")}
    return hashlib.sha256(canonical(body)).hexdigest()


def canonical(obj) -> bytes:
    """Sorted keys, no whitespace, UTF-8 (the bytes that are hashed and signed)."""
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False).encode("utf-8")


def anchor_body(seq: int, hash_: str) -> bytes:
    """The bytes the anchor's signature covers."""
    return canonical({"v": ENTRY_VERSION, "seq": seq, "hash": hash_})



def shape_problem(entry) -> str | None:
    """What makes ``entry`` not a ledger entry at all, or None."""
    if not isinstance(entry, dict):
        return "not a JSON object"
    for name, kinds in (("v", int), ("seq", int), ("prev", str), ("t", (int, float)), ("event", str),
                        ("hash", str), ("sig", str)):
        if name not in entry:
            return f"not a ledger entry (no {name!r})"
        if isinstance(entry[name], bool) or not isinstance(entry[name], kinds):
            return f"not a ledger entry ({name!r} has the wrong type)"
    if entry["v"] != ENTRY_VERSION:
        return f"entry version {entry['v']} is not supported (expected {ENTRY_VERSION})"
    if entry["seq"] < 0:
        return "not a ledger entry (negative seq)"
    if not HEX64.match(entry["hash"]) or not HEX64.match(entry["prev"]):
        return "not a ledger entry (hash or prev is not 64 hex digits)"
    if not _SIG128.match(entry["sig"]):
        return "not a ledger entry (sig is not 128 hex digits)"
    return None
