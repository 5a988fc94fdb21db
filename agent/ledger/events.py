"""Ledger entries: the event contract, entry versions, entry hashes and the entry shape.

The events and their fields are defined by one JSON Schema (draft 2020-12),
``agent/contracts/schemas/ledger-entry.json``: the envelope of every entry
and one part (``$defs/event-<name>``) per event.  The writer checks an
event's fields against its part before it writes anything
(:func:`check_fields`); the verifier checks every entry's content against
the same part once its hash matched (see :mod:`agent.ledger.verify`).

Entry versions (``v``, checked first):

1
    the entry hash is SHA-256 of sorted-key JSON (:func:`legacy_canonical`);
    still read and verified, never written any more.
2
    the entry hash is SHA-256 of the RFC 8785 canonical JSON of the entry
    without ``hash`` and ``sig`` (:mod:`agent.canonical`); written now.

See :mod:`agent.ledger` for the terminology and ``docs/ledger.md`` for the format.
"""

from __future__ import annotations

import hashlib
import json
import math
import operator
import re
from functools import cache
from typing import Any

from .. import canonical as jcs
from .. import contracts
from ..errors import LetheError

ENTRY_VERSION = 2             # the version written
ENTRY_VERSIONS = (1, 2)       # the versions read
CONTRACT = "ledger-entry"     # agent/contracts/schemas/ledger-entry.json
ZERO_HASH = "0" * 64
RESERVED = ("v", "seq", "prev", "t", "event", "hash", "sig")

HEX64 = re.compile(r"[0-9a-f]{64}\Z")
_SIG128 = re.compile(r"[0-9a-f]{128}\Z")


class EventError(LetheError, ValueError):
    """An event that does not meet the ledger-entry contract (a programming error, never data dependent)."""


# -- the contract ------------------------------------------------------------------------
@cache
def contract() -> dict:
    """The parsed ledger-entry contract (the JSON Schema document)."""
    return contracts.schema(CONTRACT)


def _resolve(spec: dict) -> dict:
    """A field's schema with a top-level ``$ref`` into ``$defs`` followed (once)."""
    ref = spec.get("$ref")
    if isinstance(ref, str) and ref.startswith("#/$defs/"):
        return {**contract()["$defs"][ref[len("#/$defs/"):]], **{k: v for k, v in spec.items() if k != "$ref"}}
    return spec


def event_part(event: str) -> dict:
    """The schema part (``$defs/event-<event>``) of one event."""
    return contract()["$defs"][f"event-{event}"]


LEDGER_EVENTS: tuple[str, ...] = tuple(contract()["properties"]["event"]["enum"])
KINDS: tuple[str, ...] = tuple(contract()["$defs"]["kind"]["enum"])


def _fields_of(event: str) -> tuple[dict[str, dict], dict[str, dict]]:
    part = event_part(event)
    names = [k for k in part["properties"] if k not in RESERVED]
    specs = {k: _resolve(part["properties"][k]) for k in names}
    required = set(part.get("required", ()))
    return ({k: specs[k] for k in names if k in required}, {k: specs[k] for k in names if k not in required})


# event -> (required fields, optional fields), each name -> its (resolved) schema
EVENT_FIELDS: dict[str, tuple[dict[str, dict], dict[str, dict]]] = {e: _fields_of(e) for e in LEDGER_EVENTS}


def _plain(v: Any) -> Any:
    """numpy scalars (from the feature code), also inside a mapping, as the Python numbers they hold."""
    if type(v) in (int, float, str, bool) or v is None:
        return v
    if isinstance(v, dict):
        return {k: _plain(x) for k, x in v.items()}
    item = getattr(v, "item", None)
    if item is not None and type(v).__module__ == "numpy":
        return item()
    return v


def _non_finite(fields: dict) -> str | None:
    for k, v in fields.items():
        if isinstance(v, float) and not math.isfinite(v):
            return k
    return None


def _normalised(spec: dict, v: Any) -> Any:
    """A valid value in the type its schema names: numbers as float, integers as int."""
    t = spec.get("type")
    if t == "number" and not isinstance(v, bool) and isinstance(v, (int, float)):
        return float(v)
    if t == "integer" and not isinstance(v, bool) and isinstance(v, float):
        return operator.index(int(v))
    return v


def check_fields(event, fields: dict) -> tuple[dict, list[str]]:
    """Check an event's fields against the ledger-entry contract.

    Parameters
    ----------
    event : str
        One of :data:`LEDGER_EVENTS`.
    fields : dict
        The event's fields (no envelope member: those are set by the ledger).

    Returns
    -------
    (dict, list of str)
        The fields with numpy scalars as Python numbers, times and durations
        as float and counts as int; and the problems, each naming the event,
        the field and what was expected (empty when the fields are valid).
    """
    if event not in LEDGER_EVENTS:
        return {}, [f"unknown event {event!r} (known: {', '.join(LEDGER_EVENTS)})"]
    required, optional = EVENT_FIELDS[event]
    problems = []
    for name in fields:
        if name in RESERVED:
            problems.append(f"field {name!r} is set by the ledger itself")
        elif name not in required and name not in optional:
            allowed = list(required) + list(optional)
            problems.append(f"event {event!r} has no field {name!r} "
                            f"(allowed: {', '.join(allowed) if allowed else 'none'})")
    if problems:
        return {}, problems
    plain = {k: _plain(v) for k, v in fields.items()}
    if _non_finite(plain) is None and contracts.is_valid(CONTRACT, plain, part=f"event-{event}"):
        specs = {**required, **optional}
        return {k: _normalised(specs[k], v) for k, v in plain.items()}, []
    return {}, [f"event {event!r}: [{key}] {message}"
                for key, message in contracts.iter_problems(CONTRACT, plain, part=f"event-{event}")]


def validate_event(event, fields: dict) -> dict:
    """The normalised fields of a valid event; :class:`EventError` naming the event, field and expectation."""
    norm, problems = check_fields(event, dict(fields))
    if problems:
        raise EventError(f"ledger: {'; '.join(problems)}")
    return norm


def content_problems(entry: dict) -> list[str]:
    """What in a (well-formed, hash-checked) entry's content does not meet its event's part."""
    event = entry["event"]
    fields = {k: v for k, v in entry.items() if k not in RESERVED}
    if event in LEDGER_EVENTS and _non_finite(fields) is None \
            and contracts.is_valid(CONTRACT, fields, part=f"event-{event}"):
        return []
    _, problems = check_fields(event, fields)
    return problems


# -- entry hashes ------------------------------------------------------------------------
def legacy_canonical(obj) -> bytes:
    """Version 1's hashed form: sorted keys, no whitespace, UTF-8 (Python's ``json.dumps``).

    Kept to verify version-1 entries, anchors and checkpoints; version 2 uses
    RFC 8785 (:func:`agent.canonical.dumps`).
    """
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False).encode("utf-8")


def signed_form(obj, version: Any) -> bytes:
    """The bytes hashed or signed for a document of ledger format ``version``.

    Raises
    ------
    ValueError
        For a version this lethe does not read; :class:`agent.canonical.CanonicalJSONError`
        (a ``ValueError`` too) when a version-2 document holds a value RFC 8785 cannot represent.
    """
    if version == 2:
        return jcs.dumps(obj)
    if version == 1:
        return legacy_canonical(obj)
    raise ValueError(f"ledger format version {version!r} is not supported (this lethe reads "
                     f"{' and '.join(map(str, ENTRY_VERSIONS))})")


def entry_hash(entry: dict) -> str:
    """SHA-256 hex of the entry without ``hash`` and ``sig`` in its version's canonical form."""
    body = {k: v for k, v in entry.items() if k not in ("hash", "sig")}
    return hashlib.sha256(signed_form(body, entry.get("v"))).hexdigest()


def anchor_body(seq: int, hash_: str, version: int = ENTRY_VERSION) -> bytes:
    """The bytes the anchor's signature covers."""
    return signed_form({"v": version, "seq": seq, "hash": hash_}, version)


def shape_problem(entry) -> str | None:
    """What makes ``entry`` not a ledger entry at all, or None.

    The version is checked first, so an entry of a later format is refused
    as such.  This is the envelope's framing only (the contract's top-level
    ``required`` and ``properties``, checked by hand because every line of a
    long ledger passes through it at start-up); an entry that passes is a
    leaf of the Merkle log.  Its content is checked against the contract
    after its hash (:func:`content_problems`).
    """
    if not isinstance(entry, dict):
        return "not a JSON object"
    v = entry.get("v")
    if "v" not in entry:
        return "not a ledger entry (no 'v')"
    if isinstance(v, bool) or v not in ENTRY_VERSIONS:
        return (f"entry version {v!r} is not supported (this lethe reads versions "
                f"{' and '.join(map(str, ENTRY_VERSIONS))})")
    for name, kinds in (("seq", int), ("prev", str), ("t", (int, float)), ("event", str),
                        ("hash", str), ("sig", str)):
        if name not in entry:
            return f"not a ledger entry (no {name!r})"
        if isinstance(entry[name], bool) or not isinstance(entry[name], kinds):
            return f"not a ledger entry ({name!r} has the wrong type)"
    if entry["seq"] < 0:
        return "not a ledger entry (negative seq)"
    if not HEX64.match(entry["hash"]) or not HEX64.match(entry["prev"]):
        return "not a ledger entry (hash or prev is not 64 hex digits)"
    if not _SIG128.match(entry["sig"]):
        return "not a ledger entry (sig is not 128 hex digits)"
    return None
