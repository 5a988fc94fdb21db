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
from typing import Any

import rfc8785

from .errors import DataError

__all__ = ["CanonicalJSONError", "dumps", "sha256_hex"]


class CanonicalJSONError(DataError, ValueError):
    """A value that RFC 8785 cannot represent (NaN, infinity, a huge integer, a non-JSON type)."""


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
    try:
        return rfc8785.dumps(obj)
    except rfc8785.CanonicalizationError as e:
        raise CanonicalJSONError(f"canonical JSON (RFC 8785): {e}") from None
    except (TypeError, ValueError) as e:
        raise CanonicalJSONError(f"canonical JSON (RFC 8785): expected JSON values only: {e}") from None


def sha256_hex(obj: Any) -> str:
    """SHA-256 (hex) of :func:`dumps` of ``obj``."""
    return hashlib.sha256(dumps(obj)).hexdigest()
