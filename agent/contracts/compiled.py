"""A fast yes/no check for the plain subset of JSON Schema, compiled once from a schema.

``jsonschema`` walks a schema keyword by keyword for every instance, about
65 µs per ledger event on the 2-core test machine, more than the Ed25519
signature of the same entry.  The ledger checks every event it writes and
every entry it verifies, so :func:`compile_schema` turns a schema that uses
only the keywords below into nested Python closures that answer *valid or
not* in a few microseconds.  It never words a problem: when it says *not
valid*, :func:`agent.contracts.iter_problems` (``jsonschema``) finds and words
the problems, so the messages are always ``jsonschema``'s.  A schema (or
part) using any other keyword is not compiled (:func:`compile_schema`
returns None) and ``jsonschema`` answers instead.

Keywords: ``type``, ``enum``, ``const``, ``pattern``, ``minLength``,
``maxLength``, ``minimum``, ``maximum``, ``exclusiveMinimum``,
``exclusiveMaximum``, ``required``, ``properties``, ``additionalProperties``,
``propertyNames``, ``anyOf``, ``allOf``, ``if``/``then``/``else``, ``$ref`` (to ``#/$defs/...``), boolean
schemas, and annotations (``description``, ``title``, ``default``,
``$comment``, ``x-...``).  The semantics are draft 2020-12's as ``jsonschema``
implements them (``true`` is not ``1``; an integral float is an integer;
keywords apply only to instances of their type), and
``tests/test_contracts_compiled.py`` checks the two agree on generated
instances.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from typing import Any

__all__ = ["compile_schema"]

Check = Callable[[Any], bool]

_ANNOTATIONS = {"description", "title", "default", "$comment", "examples", "$schema", "$id", "$defs",
                "deprecated", "readOnly", "writeOnly"}
_KNOWN = {"type", "enum", "const", "pattern", "minLength", "maxLength", "minimum", "maximum", "exclusiveMinimum",
          "exclusiveMaximum", "required", "properties", "additionalProperties", "propertyNames", "anyOf", "allOf",
          "if", "then", "else", "$ref"}


class _NotCompilable(Exception):
    pass


def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


_TYPES: dict[str, Check] = {
    "string": lambda v: isinstance(v, str),
    "number": _is_number,
    "integer": lambda v: (isinstance(v, int) and not isinstance(v, bool))
    or (isinstance(v, float) and v.is_integer()),
    "boolean": lambda v: isinstance(v, bool),
    "null": lambda v: v is None,
    "object": lambda v: isinstance(v, dict),
    "array": lambda v: isinstance(v, list),
}


def _scalar_equal(a, b) -> bool:
    if isinstance(a, bool) or isinstance(b, bool):
        return a is b
    return a == b


def compile_schema(root: dict, schema: Any = None) -> Check | None:
    """A predicate equivalent to validating against ``schema`` (default ``root``), or None.

    Parameters
    ----------
    root : dict
        The whole schema document (``$ref`` targets are looked up in its ``$defs``).
    schema : dict or bool, optional
        The part to compile; default the whole document.
    """
    try:
        return _compile(root, root if schema is None else schema, {})
    except _NotCompilable:
        return None


def _compile(root: dict, sch: Any, refs: dict[str, Check | None]) -> Check:
    if sch is True:
        return _always
    if sch is False:
        return _never
    if not isinstance(sch, dict):
        raise _NotCompilable
    for k in sch:
        if k not in _KNOWN and k not in _ANNOTATIONS and not k.startswith("x-"):
            raise _NotCompilable
    checks: list[Check] = []
    if "$ref" in sch:
        ref = sch["$ref"]
        if not (isinstance(ref, str) and ref.startswith("#/$defs/") and "/" not in ref[len("#/$defs/"):]):
            raise _NotCompilable
        name = ref[len("#/$defs/"):]
        if name in refs and refs[name] is None:
            raise _NotCompilable  # a recursive schema: left to jsonschema
        if name not in refs:
            target = root.get("$defs", {}).get(name)
            if target is None:
                raise _NotCompilable
            refs[name] = None
            refs[name] = _compile(root, target, refs)
        compiled = refs[name]
        assert compiled is not None
        checks.append(compiled)
    if "type" in sch:
        types = sch["type"] if isinstance(sch["type"], list) else [sch["type"]]
        if any(t not in _TYPES for t in types):
            raise _NotCompilable
        checks.append(_any_of([_TYPES[t] for t in types]))
    if "enum" in sch or "const" in sch:
        allowed = list(sch["enum"]) if "enum" in sch else [sch["const"]]
        if any(isinstance(a, (dict, list)) for a in allowed):
            raise _NotCompilable
        checks.append(_enum(allowed))
    if "pattern" in sch:
        checks.append(_pattern(re.compile(sch["pattern"])))
    if "minLength" in sch or "maxLength" in sch:
        checks.append(_length(sch.get("minLength", 0), sch.get("maxLength")))
    for kw in ("minimum", "maximum", "exclusiveMinimum", "exclusiveMaximum"):
        if kw in sch:
            checks.append(_bound(kw, sch[kw]))
    if "required" in sch:
        checks.append(_required(tuple(sch["required"])))
    if "properties" in sch or "additionalProperties" in sch or "propertyNames" in sch:
        props = {k: _compile(root, s, refs) for k, s in sch.get("properties", {}).items()}
        extra = _compile(root, sch["additionalProperties"], refs) if "additionalProperties" in sch else None
        names = _compile(root, sch["propertyNames"], refs) if "propertyNames" in sch else None
        checks.append(_members(props, extra, names))
    if "anyOf" in sch:
        checks.append(_any_of([_compile(root, s, refs) for s in sch["anyOf"]]))
    if "allOf" in sch:
        checks.extend(_compile(root, s, refs) for s in sch["allOf"])
    if "if" in sch:
        checks.append(_if_then_else(_compile(root, sch["if"], refs), _compile(root, sch.get("then", True), refs),
                                    _compile(root, sch.get("else", True), refs)))
    return _all_of(checks)


# -- one factory per keyword (closures, so each check reads only its own bound values) ------
def _always(v: Any) -> bool:
    return True


def _never(v: Any) -> bool:
    return False


def _all_of(checks: list[Check]) -> Check:
    if not checks:
        return _always
    if len(checks) == 1:
        return checks[0]
    cs = tuple(checks)

    def check(v: Any) -> bool:
        return all(c(v) for c in cs)
    return check


def _any_of(checks: list[Check]) -> Check:
    if len(checks) == 1:
        return checks[0]
    cs = tuple(checks)

    def check(v: Any) -> bool:
        return any(c(v) for c in cs)
    return check


def _enum(allowed: list) -> Check:
    def check(v: Any) -> bool:
        return not isinstance(v, (dict, list)) and any(_scalar_equal(v, a) for a in allowed)
    return check


def _pattern(rx: re.Pattern) -> Check:
    def check(v: Any) -> bool:
        return not isinstance(v, str) or rx.search(v) is not None
    return check


def _length(lo: int, hi: int | None) -> Check:
    def check(v: Any) -> bool:
        return not isinstance(v, str) or (len(v) >= lo and (hi is None or len(v) <= hi))
    return check


def _bound(kw: str, b: float) -> Check:
    def check(v: Any) -> bool:
        if not _is_number(v):
            return True
        if kw == "minimum":
            return v >= b
        if kw == "maximum":
            return v <= b
        if kw == "exclusiveMinimum":
            return v > b
        return v < b
    return check


def _required(names: tuple) -> Check:
    def check(v: Any) -> bool:
        return not isinstance(v, dict) or all(k in v for k in names)
    return check


def _members(props: dict[str, Check], extra: Check | None, names: Check | None) -> Check:
    def check(v: Any) -> bool:
        if not isinstance(v, dict):
            return True
        for k, x in v.items():
            if names is not None and not names(k):
                return False
            c = props.get(k)
            if c is not None:
                if not c(x):
                    return False
            elif extra is not None and not extra(x):
                return False
        return True
    return check


def _if_then_else(cond: Check, then: Check, other: Check) -> Check:
    def check(v: Any) -> bool:
        return then(v) if cond(v) else other(v)
    return check
