"""Format contracts: one JSON Schema (draft 2020-12) per document format, and one validator.

The schemas are package data (``agent/contracts/schemas/<name>.json``) so that
a researcher or an ethics board can check a file from R or any other language
with an off-the-shelf JSON Schema validator.  Inside lethe every format is
checked by :func:`validate`, whose errors say, as before, which file, which key
and what was expected::

    policy.toml: [retention.raw_seconds] value 0.5 is out of range: expected >= 1.0

Rules that relate two values of one document (a scale's minimum below its
maximum, a fingerprint that must match a key) are not expressible in JSON
Schema; the module that owns the format checks them after :func:`validate`
and its documentation lists them.

Annotations of our own (ignored by other validators) refine the messages:

``x-lethe-member``
    on an object: what its members are called in messages (``section``, ``key``,
    ``field``); default ``field``.
``x-lethe-expected``
    on any schema: the words for what was expected when a ``pattern`` or
    ``format`` fails.
``x-lethe-unit``, ``x-lethe-stricter``
    documentation only: the unit of a number and which direction keeps or
    sends less (used by ``docs/policy.md`` and ``lethe audit diff``).
"""

from __future__ import annotations

import difflib
import json
import math
from collections.abc import Callable, Iterator
from contextlib import suppress
from functools import cache
from importlib import resources
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from jsonschema import Draft202012Validator, FormatChecker
from jsonschema.exceptions import ValidationError

from ..errors import DataError

__all__ = ["ContractError", "SCHEMA_NAMES", "apply_defaults", "check_header", "is_valid", "iter_problems", "read_json",
           "schema", "validate"]

SCHEMA_NAMES = ("policy", "board-limits", "study-card", "enrolment", "withdrawal", "payload", "scenario",
                "bundle-header", "ledger-entry", "server-api")


class ContractError(DataError):
    """A document that does not meet its schema: ``source``, dotted ``key`` and ``message``."""

    def __init__(self, source, key: str, message: str):
        self.path = str(source)
        self.source = str(source)
        self.key = key
        self.reason = message
        super().__init__(f"{self.source}: [{key}] {message}")


# -- reading documents -------------------------------------------------------------------
def read_json(path, what: str, *, max_bytes: int = 1 << 20) -> Any:
    """Parse a JSON document file; every failure is a :class:`DataError` naming the file.

    Parameters
    ----------
    path : path-like
        The file.
    what : str
        What the document is, for messages ("study card", "enrolment").
    max_bytes : int
        Larger files are refused before parsing.
    """
    p = Path(path)
    try:
        data = p.read_bytes()
    except FileNotFoundError:
        raise DataError(f"{p}: no such {what} file") from None
    except OSError as e:
        raise DataError(f"{p}: cannot read the {what}: {e.strerror}") from None
    if len(data) > max_bytes:
        raise DataError(f"{p}: too large for a {what} ({len(data)} bytes)")
    try:
        return json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as e:
        raise DataError(f"{p}: not a JSON {what} ({e})") from None


def check_header(doc, fmt: str, version: int, source, what: str) -> None:
    """Object, ``format`` and ``version`` first, so that a future document is refused as such."""
    if not isinstance(doc, dict):
        raise DataError(f"{source}: expected a JSON object ({what})")
    if doc.get("format") != fmt:
        raise DataError(f"{source}: [format] expected {fmt!r}, got {doc.get('format')!r}")
    if doc.get("version") != version:
        raise DataError(f"{source}: [version] {what} version {doc.get('version')!r} is not supported; "
                        f"this lethe reads version {version}")


# -- schemas -----------------------------------------------------------------------------
@cache
def schema(name: str) -> dict:
    """The parsed JSON Schema document called ``name`` (see :data:`SCHEMA_NAMES`)."""
    if name not in SCHEMA_NAMES:
        raise ValueError(f"unknown contract {name!r}; known: {', '.join(SCHEMA_NAMES)}")
    text = resources.files(__package__).joinpath("schemas", f"{name}.json").read_text("utf-8")
    return json.loads(text)


_FORMATS = FormatChecker(formats=())


@_FORMATS.checks("iana-time-zone", raises=(ZoneInfoNotFoundError, ValueError))
def _is_time_zone(value) -> bool:
    if not isinstance(value, str):
        return True
    ZoneInfo(value)
    return True


_FORMAT_WORDS = {"iana-time-zone": "an IANA time zone name such as 'Europe/Lisbon'"}


@cache
def _validator(name: str, part: str | None = None) -> Draft202012Validator:
    doc = schema(name)
    Draft202012Validator.check_schema(doc)
    whole = Draft202012Validator(doc, format_checker=_FORMATS)
    if part is None:
        return whole
    if part not in doc.get("$defs", {}):
        raise ValueError(f"contract {name!r} has no part {part!r} under $defs")
    return whole.evolve(schema={"$ref": f"#/$defs/{part}"})


@cache
def _fast(name: str, part: str | None = None) -> Callable[[Any], bool]:
    from .compiled import compile_schema

    doc = schema(name)
    if part is not None and part not in doc.get("$defs", {}):
        raise ValueError(f"contract {name!r} has no part {part!r} under $defs")
    # Not checked against the meta-schema here (that costs about 90 ms on first use, in every
    # process): tests/test_contracts.py checks every schema, and _validator checks it before
    # any message is worded.
    check = compile_schema(doc, doc if part is None else doc["$defs"][part])
    return check if check is not None else _validator(name, part).is_valid


def is_valid(name: str, obj: Any, *, part: str | None = None) -> bool:
    """Whether ``obj`` meets schema ``name`` (or its ``$defs/<part>``), without building messages.

    A schema that uses only plain keywords is answered by a predicate compiled
    from it once (:mod:`agent.contracts.compiled`, a few microseconds instead
    of tens); any other by ``jsonschema``.  Non-finite numbers are not
    checked here (:func:`iter_problems` reports them).
    """
    return _fast(name, part)(obj)


# -- messages ----------------------------------------------------------------------------
_TYPE_WORDS = {"number": "a number", "integer": "an integer", "string": "a string", "boolean": "true or false",
               "array": "a list", "object": "an object", "null": "null"}
_JSON_TYPE = {bool: "true or false", int: "an integer", float: "a number", str: "a string", list: "a list",
              dict: "an object", type(None): "null"}


def _dotted(path, keep_last_index: bool = False) -> str:
    """Dotted key: ``places[1].sound``; a trailing list index is dropped (the list is named as a whole)."""
    out = ""
    path = list(path)
    for n, p in enumerate(path):
        if isinstance(p, int):
            if n == len(path) - 1 and not keep_last_index:
                break
            out += f"[{p}]"
        else:
            out += f".{p}" if out else str(p)
    return out


def _item(path) -> int | None:
    path = list(path)
    return path[-1] if path and isinstance(path[-1], int) else None


def _type_words(t, syntax: str) -> str:
    ts = t if isinstance(t, list) else [t]
    return " or ".join("a table" if x == "object" and syntax == "toml" else _TYPE_WORDS.get(x, str(x)) for x in ts)


def _show(value) -> str:
    r = repr(value)
    return r if len(r) <= 80 else r[:77] + "..."


def _member_noun(schema_obj: dict) -> str:
    return schema_obj.get("x-lethe-member", "field")


class _Say:
    """Words in the house style of a format: TOML files ("value X is out of range: expected Y")
    or JSON documents ("expected Y, got X")."""

    def __init__(self, syntax: str):
        self.toml = syntax == "toml"
        self.syntax = syntax

    def bad_value(self, v, expected: str) -> str:
        return f"value {_show(v)} is out of range: expected {expected}" if self.toml else \
            f"expected {expected}, got {_show(v)}"

    def bad_type(self, v, expected: str) -> str:
        if self.toml:
            return f"value {_show(v)} has the wrong type: expected {expected}"
        return f"expected {expected}, got {_JSON_TYPE.get(type(v), type(v).__name__)}"


# Keywords whose failure is worded by the schema's own x-lethe-expected, when it has one.
_WORDED = ("type", "const", "minimum", "maximum", "exclusiveMinimum", "exclusiveMaximum", "pattern", "format",
           "minLength", "maxLength")


def _message(err: ValidationError, syntax: str) -> tuple[str, str]:
    """(dotted key, message) for one jsonschema error."""
    say = _Say(syntax)
    path = list(err.absolute_path)
    key = _dotted(path)
    item = _item(path)
    v, kw, sch = err.instance, err.validator, err.schema
    whole = getattr(err, "_lethe_list", None) if item is not None else None
    owner = _dotted(path, keep_last_index=True)  # the object whose members are named below
    if "x-lethe-key-expected" in sch:  # a propertyNames schema: the key itself is wrong
        return (f"{owner}.{v}" if owner else str(v)), f"unexpected key: expected {sch['x-lethe-key-expected']}"
    expected = sch.get("x-lethe-expected")
    if expected and kw in _WORDED:
        if whole is not None:
            return key, say.bad_value(whole, f"{expected} (item {item}: {_show(v)})")
        return key, say.bad_value(v, expected)
    if kw == "additionalProperties":
        allowed = list(sch.get("properties", {}))
        extra = [k for k in v if k not in allowed] if isinstance(v, dict) else []
        name = extra[0] if extra else "?"
        noun = _member_noun(sch)
        near = difflib.get_close_matches(name, allowed, n=1, cutoff=0.75)
        hint = f" (did you mean {near[0]!r}?)" if near else ""
        dotted = f"{owner}.{name}" if owner else name
        inside = f" in [{owner}]" if owner else ""
        plural = {"section": "sections", "key": "keys"}.get(noun, "fields")
        what = f"unknown {noun} [{name}]" if noun == "section" else f"unknown {noun}"
        return dotted, f"{what}{hint}; allowed {plural}{inside}: {', '.join(allowed)}"
    if kw == "required":
        missing = [k for k in err.validator_value if isinstance(v, dict) and k not in v]
        name = missing[0] if missing else "?"
        sub = sch.get("properties", {}).get(name, {})
        noun = _member_noun(sch)
        dotted = f"{owner}.{name}" if owner else name
        if noun == "section":
            return dotted, f"missing section [{name}]"
        desc = sub.get("description") or _type_words(sub.get("type", "?"), syntax)
        return dotted, f"required {noun} is missing ({desc.rstrip('.')})"
    if kw == "type":
        if sch.get("type") == "object" and syntax == "toml":
            return key, f"expected a table [{key}], got {type(v).__name__}"
        return key, say.bad_type(v, _type_words(sch["type"], syntax))
    if kw in ("minimum", "maximum", "exclusiveMinimum", "exclusiveMaximum"):
        sign = {"minimum": ">=", "maximum": "<=", "exclusiveMinimum": ">", "exclusiveMaximum": "<"}[kw]
        return key, say.bad_value(v, f"{sign} {err.validator_value}")
    if kw == "const":
        return key, say.bad_value(v, _show(err.validator_value))
    if kw == "enum":
        if whole is not None:
            unknown = [x for x in whole if x not in err.validator_value]
            return key, say.bad_value(whole, f"a list drawn from {list(err.validator_value)} (unknown: {unknown})")
        return key, say.bad_value(v, "one of " + ", ".join(repr(c) for c in err.validator_value))
    if kw == "uniqueItems":
        return key, say.bad_value(v, "a list without repeats")
    if kw == "minItems":
        return key, say.bad_value(v, "a non-empty list" if err.validator_value == 1
                                  else f"at least {err.validator_value} items")
    if kw == "maxItems":
        return key, say.bad_value(f"{len(v)} items", f"at most {err.validator_value} items")
    if kw in ("minLength", "maxLength"):
        words = "at least" if kw == "minLength" else "at most"
        return key, say.bad_value(v, f"{words} {err.validator_value} characters")
    if kw in ("pattern", "format"):
        expected = (_FORMAT_WORDS.get(err.validator_value, err.validator_value) if kw == "format"
                    else f"text matching {err.validator_value}")
        if whole is not None:
            return key, say.bad_value(whole, f"{expected} (item {item}: {_show(v)})")
        return key, say.bad_value(v, expected)
    return key, say.bad_value(v, expected) if expected else err.message


_PRIORITY = {"additionalProperties": 0, "required": 1, "type": 2, "const": 3}


def _order(err: ValidationError) -> tuple:
    # Shallow problems first, and among them unknown or missing names before
    # values: the first problem a reader would meet is reported.
    return (len(err.absolute_path), _PRIORITY.get(err.validator, 9))


def _non_finite(obj, path=()) -> Iterator[tuple[tuple, float]]:
    if isinstance(obj, float) and not math.isfinite(obj):
        yield path, obj
    elif isinstance(obj, dict):
        for k, v in obj.items():
            yield from _non_finite(v, (*path, k))
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            yield from _non_finite(v, (*path, i))


def _lookup(root, path):
    for p in path:
        root = root[p]
    return root


def iter_problems(name: str, obj: Any, *, syntax: str = "json", part: str | None = None
                  ) -> Iterator[tuple[str, str]]:
    """Every ``(dotted key, message)`` problem of ``obj`` against schema ``name``, most relevant first.

    ``part`` checks against the schema's ``$defs/<part>`` instead of the whole
    document (the ledger checks an event's fields against its event's part).
    """
    for path, v in _non_finite(obj):
        key = _dotted(path)
        yield key, _Say(syntax).bad_value(v, "a finite number")
    errors = list(_validator(name, part).iter_errors(obj))
    for e in errors:
        p = list(e.absolute_path)
        if p and isinstance(p[-1], int):
            with suppress(KeyError, IndexError, TypeError):
                e._lethe_list = _lookup(obj, p[:-1])  # type: ignore[attr-defined]
    order = {id(e): i for i, e in enumerate(errors)}
    for e in sorted(errors, key=lambda e: (*_order(e), order[id(e)])):
        yield _message(e, syntax)


def validate(name: str, obj: Any, source, *, syntax: str = "json",
             error: Callable[[Any, str, str], Exception] = ContractError) -> Any:
    """Check ``obj`` against the schema ``name``; raise for its first problem.

    Parameters
    ----------
    name : str
        One of :data:`SCHEMA_NAMES`.
    obj : object
        The parsed document (from :mod:`json` or :mod:`tomllib`).
    source : str or path-like
        What to call the document in the error: its file name, or a request.
    syntax : {"json", "toml"}
        Words for the messages: a TOML object is a "table".
    error : callable
        ``error(source, dotted_key, message)`` builds the exception raised;
        :class:`ContractError` (a :class:`~agent.errors.DataError`) by default,
        :class:`~agent.errors.PolicyError` for policies.

    Returns
    -------
    object
        ``obj`` itself, unchanged.
    """
    for key, message in iter_problems(name, obj, syntax=syntax):
        raise error(source, key or "<document>", message)
    return obj


def apply_defaults(name: str, obj: dict) -> dict:
    """A copy of ``obj`` with every missing member that has a ``default`` (at any depth) filled in.

    Missing objects whose members have defaults are created (``{}``) first, so a
    document may leave out a whole section.
    """
    return _fill(schema(name), obj)


def _fill(sch: dict, obj):
    if not isinstance(obj, dict) or sch.get("type") != "object":
        return obj
    out = dict(obj)
    for k, sub in sch.get("properties", {}).items():
        if k not in out:
            if "default" in sub:
                out[k] = json.loads(json.dumps(sub["default"]))
            elif sub.get("type") == "object":
                out[k] = {}
        if k in out:
            out[k] = _fill(sub, out[k])
    return out
