"""Bounded JSON for everything the researcher side reads from a device.

A bundle, an enrolment or a withdrawal certificate comes from a device the
study does not control, so its JSON is parsed with limits: nesting depth,
integer size and finite floats.  Integers are limited to the I-JSON range
(RFC 7493 section 2.2: magnitude at most 2**53 - 1, exactly representable as an
IEEE 754 double), so a value such as ``10**4000`` is refused at parse time
instead of crashing a later report; ``NaN``, ``Infinity`` and floats that
overflow to infinity are refused as well (RFC 8259 section 6 has no such values).
"""

from __future__ import annotations

import json
import math
from typing import Any

from ..errors import DataError

MAX_DEPTH = 32
MAX_SAFE_INT = 2**53 - 1  # RFC 7493 section 2.2


def loads_bounded(data: bytes | str, source: str, what: str = "document", *, max_depth: int = MAX_DEPTH) -> Any:
    """Parse JSON with bounded depth and numbers; :class:`DataError` names ``source`` and the reason.

    Parameters
    ----------
    data : bytes or str
        UTF-8 JSON text.
    source : str
        The file or request named in errors.
    what : str
        What the document is ("payload", "bundle header", ...), for the message.
    max_depth : int
        Largest allowed nesting of arrays and objects (1 = a flat object).
    """
    if not isinstance(max_depth, int) or max_depth < 1:
        raise ValueError(f"max_depth: expected a positive integer, got {max_depth!r}")

    def parse_int(text: str) -> int:
        if len(text.lstrip("-")) > 16 or abs(int(text)) > MAX_SAFE_INT:
            raise DataError(f"{source}: {what}: integer {text[:24]}{'…' if len(text) > 24 else ''} is out of "
                            f"range (at most {MAX_SAFE_INT} in magnitude, RFC 7493)")
        return int(text)

    def parse_float(text: str) -> float:
        v = float(text)
        if not math.isfinite(v):
            raise DataError(f"{source}: {what}: number {text[:24]} is out of range (overflows a double)")
        return v

    def parse_constant(text: str) -> float:
        raise DataError(f"{source}: {what}: {text} is not a JSON number (RFC 8259 section 6)")

    try:
        text = data.decode("utf-8") if isinstance(data, bytes | bytearray) else data
        obj = json.loads(text, parse_int=parse_int, parse_float=parse_float, parse_constant=parse_constant)
    except RecursionError:
        raise DataError(f"{source}: {what} is nested too deeply (limit {max_depth} levels)") from None
    except (UnicodeDecodeError, ValueError) as e:
        raise DataError(f"{source}: {what} is not valid JSON ({e})") from None
    depth = nesting_depth(obj)
    if depth > max_depth:
        raise DataError(f"{source}: {what} is nested {depth} levels deep; the limit is {max_depth}")
    return obj


def nesting_depth(obj: Any) -> int:
    """Depth of arrays/objects in a parsed JSON value (a scalar is 0), without recursion."""
    best = 0
    stack = [(obj, 1)]
    while stack:
        v, d = stack.pop()
        if isinstance(v, dict):
            best = max(best, d)
            stack.extend((x, d + 1) for x in v.values())
        elif isinstance(v, list):
            best = max(best, d)
            stack.extend((x, d + 1) for x in v)
    return best
