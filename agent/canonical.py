"""Canonical JSON: the only serialisation used for hashing and signing.

The JSON Canonicalization Scheme (JCS, RFC 8785) through the ``rfc8785``
package: object members sorted by their UTF-16 code units, no insignificant
whitespace, strings with the minimal escapes, numbers in the shortest
ECMAScript form (``1.0`` is written ``1``, ``1e21`` is written ``1e+21``), UTF-8.
Values outside I-JSON (NaN, infinities, integers beyond 2**53 - 1 in
magnitude) are refused, so a document never hashes differently in another
language.

Every hash, signature, fingerprint and AEAD associated-data string computed
over a JSON document goes through :func:`dumps`; readable files (pretty
printed) are written with :func:`json.dumps` as before and re-canonicalised
when checked.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

import rfc8785

from .errors import DataError

__all__ = ["CanonicalJSONError", "dumps", "sha256_hex"]


class CanonicalJSONError(DataError, ValueError):
    """A value that RFC 8785 cannot represent (NaN, infinity, a huge integer, a non-JSON type)."""


_SAFE_INT = 2 ** 53 - 1


class _Slow(Exception):
    """The value is outside the subset :func:`_fast` handles."""


def _plain(v: Any) -> Any:
    t = type(v)
    if t is str or v is None or t is bool:
        return v
    if t is int:
        if -_SAFE_INT <= v <= _SAFE_INT:
            return v
        raise _Slow
    if t is float:
        if v.is_integer():
            if abs(v) < 2 ** 53:
                return int(v)  # ECMAScript writes an integral double as its integer digits
            raise _Slow
        if "e" in repr(v) or "n" in repr(v):
            raise _Slow  # exponent forms differ (Python 1e-05, ECMAScript 0.00001); nan/inf refused below
        return v  # shortest round-trip digits in fixed notation: the same in both
    if t is dict:
        out = {}
        for k, x in v.items():
            if type(k) is not str or not k.isascii():
                raise _Slow  # code-point order is UTF-16 order only for ASCII keys
            out[k] = _plain(x)
        return out
    if t is list or t is tuple:
        return [_plain(x) for x in v]
    raise _Slow


def _fast(obj: Any) -> bytes | None:
    """RFC 8785 by the C JSON encoder for the common subset, or None when ``obj`` is outside it.

    Within the subset (ASCII member names, integers within I-JSON, floats that
    are integral below 2**53 or written without an exponent by Python) the
    output is byte for byte what ``rfc8785`` writes: members sorted, no
    whitespace, the same string escapes (quote, backslash and the control
    characters; short forms for backspace, tab, newline, form feed and carriage
    return, lower-case ``u00xx`` escapes for the others).  ``tests/test_canonical.py``
    checks that on generated documents.  About four times faster than the
    pure-Python ``rfc8785``.
    """
    try:
        plain = _plain(obj)
        return json.dumps(plain, sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                          allow_nan=False).encode("utf-8")
    except (_Slow, ValueError, UnicodeEncodeError):
        return None


def dumps(obj: Any) -> bytes:
    """The RFC 8785 canonical form of ``obj`` as UTF-8 bytes.

    Parameters
    ----------
    obj : dict, list, str, int, float, bool or None
        A JSON-compatible value; tuples are written as arrays.  numpy scalars
        are not accepted: convert them first.

    Raises
    ------
    CanonicalJSONError
        For NaN or infinite floats, integers outside ±(2**53 - 1), non-string
        object keys and values of other types.
    """
    fast = _fast(obj)
    if fast is not None:
        return fast
    try:
        return rfc8785.dumps(obj)
    except rfc8785.CanonicalizationError as e:
        raise CanonicalJSONError(f"canonical JSON (RFC 8785): {e}") from None
    except (TypeError, ValueError) as e:
        raise CanonicalJSONError(f"canonical JSON (RFC 8785): expected JSON values only: {e}") from None


def sha256_hex(obj: Any) -> str:
    """SHA-256 (hex) of :func:`dumps` of ``obj``."""
    return hashlib.sha256(dumps(obj)).hexdigest()
