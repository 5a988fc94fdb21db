"""Canonical JSON (agent.canonical) against the examples of RFC 8785 itself."""

from __future__ import annotations

import hashlib
import json
import struct

import pytest

from agent.canonical import CanonicalJSONError, dumps, sha256_hex
from agent.errors import DataError


def _f64(hex_bits: str) -> float:
    return struct.unpack(">d", bytes.fromhex(hex_bits))[0]


def test_rfc8785_section_3_2_2_example():
    # RFC 8785 section 3.2.2 (input) and its canonical output; the same pair is
    # the "values" test file of the canon-json crate's RFC test data.
    text = ('{"numbers": [333333333.33333329, 1E30, 4.50, 2e-3, 0.000000000000000000000000001],'
            '"string": "\\u20ac$\\u000F\\u000aA\'\\u0042\\u0022\\u005c\\\\\\"\\/",'
            '"literals": [null, true, false]}')
    want = ('{"literals":[null,true,false],"numbers":[333333333.3333333,1e+30,4.5,0.002,1e-27],'
            '"string":"\u20ac$\\u000f\\nA\'B\\"\\\\\\\\\\"/"}').encode("utf-8")
    assert dumps(json.loads(text)) == want


def test_rfc8785_section_3_2_3_sorting_by_utf16_code_units():
    # RFC 8785 section 3.2.3: properties sorted by UTF-16 code units, so the
    # emoji (surrogates D83D DE00) sorts before U+FB33 (from memory of the RFC's list).
    doc = {"\u20ac": "Euro Sign", "\r": "Carriage Return", "\ufb33": "Hebrew Letter Dalet With Dagesh",
           "1": "One", "\U0001f600": "Emoji: Grinning Face", "\u0080": "Control",
           "\u00f6": "Latin Small Letter O With Diaeresis"}
    keys = list(json.loads(dumps(doc)))
    assert keys == ["\r", "1", "\u0080", "\u00f6", "\u20ac", "\U0001f600", "\ufb33"]


# RFC 8785 Appendix B, number serialisation samples (IEEE 754 bits -> JSON text);
# from memory of the RFC's table.
@pytest.mark.parametrize("bits, text", [
    ("0000000000000000", "0"),
    ("8000000000000000", "0"),          # minus zero
    ("0000000000000001", "5e-324"),
    ("8000000000000001", "-5e-324"),
    ("7fefffffffffffff", "1.7976931348623157e+308"),
    ("ffefffffffffffff", "-1.7976931348623157e+308"),
    ("4340000000000000", "9007199254740992"),
    ("c340000000000000", "-9007199254740992"),
    ("4430000000000000", "295147905179352830000"),
    ("44b52d02c7e14af5", "9.999999999999997e+22"),
    ("44b52d02c7e14af6", "1e+23"),
    ("44b52d02c7e14af7", "1.0000000000000001e+23"),
    ("444b1ae4d6e2ef4e", "999999999999999700000"),
    ("444b1ae4d6e2ef50", "1e+21"),
    ("3eb0c6f7a0b5ed8c", "9.999999999999997e-7"),
    ("3eb0c6f7a0b5ed8d", "0.000001"),
    ("41b3de4355555553", "333333333.3333332"),
    ("41b3de4355555554", "333333333.33333325"),
    ("41b3de4355555555", "333333333.3333333"),
    ("41b3de4355555556", "333333333.3333334"),
    ("c1b3de4355555555", "-333333333.3333333"),
])
def test_rfc8785_appendix_b_numbers(bits, text):
    assert dumps(_f64(bits)) == text.encode("ascii")


@pytest.mark.parametrize("bits", ["7fffffffffffffff", "7ff0000000000000", "fff0000000000000"])
def test_rfc8785_appendix_b_nan_and_infinity_are_refused(bits):
    # RFC 8785 Appendix B: NaN and Infinity have no JSON form ("N/A" in the table).
    with pytest.raises(CanonicalJSONError):
        dumps(_f64(bits))


def test_integer_beyond_ijson_range_is_refused():
    # RFC 7493 (I-JSON) section 2.2: integers within +-(2**53 - 1).
    assert dumps(2 ** 53 - 1) == b"9007199254740991"
    with pytest.raises(CanonicalJSONError):
        dumps(2 ** 53 + 1)


def test_non_string_key_is_refused_with_a_data_error():
    with pytest.raises(DataError, match="canonical JSON"):
        dumps({1: "x"})


def test_unsupported_type_is_refused():
    with pytest.raises(CanonicalJSONError, match="canonical JSON"):
        dumps({"a": object()})


def test_sha256_hex_is_the_hash_of_the_canonical_bytes():
    # FIPS 180-4 SHA-256 through hashlib; the canonical text from RFC 8785 section 3.2.2 rules.
    assert sha256_hex({"b": 1.0, "a": [True]}) == hashlib.sha256(b'{"a":[true],"b":1}').hexdigest()


# -- the fast path (agent.canonical._fast) writes exactly what the rfc8785 package writes ----------
from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402
import rfc8785  # noqa: E402

_KEYS = st.one_of(st.text(max_size=4), st.sampled_from(["a", "b", "A", "_", "\u20ac", "\U0001f600", "\ufb33"]))
_LEAVES = st.one_of(
    st.none(), st.booleans(), st.integers(-(2 ** 53) - 2, 2 ** 53 + 2), st.integers(-5, 5),
    st.floats(allow_nan=False, allow_infinity=False), st.floats(-1e7, 1e7),
    st.sampled_from([0.0, -0.0, 1.0, 2.0 ** 53, 2.0 ** 53 - 1, 1e-4, 1e-5, 1e-7, 1e16, 1e21, 0.1, 1790000000.25]),
    st.text(max_size=6), st.sampled_from(["\x00", "\x1f", "\x7f", "\u2028", '"', "\\", "\b\f\n\r\t", "\ud800"]),
)
_DOCS = st.recursive(_LEAVES, lambda inner: st.one_of(st.lists(inner, max_size=4),
                                                      st.dictionaries(_KEYS, inner, max_size=4)), max_leaves=12)


@settings(max_examples=600, deadline=None)
@given(doc=_DOCS)
def test_dumps_is_byte_identical_to_the_rfc8785_package(doc):
    # the rfc8785 package is the reference implementation of RFC 8785
    try:
        want = rfc8785.dumps(doc)
    except (rfc8785.CanonicalizationError, TypeError, ValueError, UnicodeEncodeError):
        with pytest.raises(CanonicalJSONError):
            dumps(doc)
        return
    assert dumps(doc) == want


@pytest.mark.parametrize("value", [2.0 ** 53, 1e16, 1e-5, 1e21, 5e-324, {"\u20ac": 1, "z": 2}, (1, 2.5)])
def test_values_outside_the_fast_subset_are_still_rfc8785(value):
    assert dumps(value) == rfc8785.dumps(value)
