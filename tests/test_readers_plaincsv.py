"""The plain-decimal CSV reader against Python's float() and numpy.loadtxt.

Reference: Python's ``float(str)`` returns the correctly rounded IEEE 754
binary64 value of a decimal string (Python documentation, "Floating point
arithmetic", and David Gay's correctly rounded conversion it uses), and
``numpy.loadtxt`` parses the same fields with the same rounding.  Every value
the fast reader returns must equal both bit for bit, sign of zero included.
"""

from __future__ import annotations

import io
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.intake.readers.plaincsv import CHUNK_BYTES, parse_plain


def _floats(body: bytes, n_cols: int) -> np.ndarray:
    rows = [line.split(",") for line in body.decode().splitlines()]
    return np.array([[float(f) for f in r] for r in rows], dtype=np.float64).reshape(-1, n_cols)


def _same(a: np.ndarray, b: np.ndarray) -> bool:
    return a.shape == b.shape and bool(np.array_equal(a, b)) and bool(
        np.array_equal(np.signbit(a), np.signbit(b)))


# A plain field: optional '-', digits, at most one point, at most 16 characters after the sign.
_digits = st.text(alphabet="0123456789", min_size=0, max_size=9)


@st.composite
def plain_field(draw):
    sign = draw(st.sampled_from(["", "-"]))
    left = draw(_digits)
    point = draw(st.booleans())
    right = draw(_digits) if point else ""
    if not (left or right):
        left = "0"
    body = (left + ("." if point else "") + right)[:16]
    return sign + (body if body.strip(".") else "0")


def _declinable(field: str) -> bool:
    """Plain, but left to the general parser: a mantissa of 16+ digits (maybe >= 2**53) or
    8+ digits after the point (the point outside the last word)."""
    digits = field.lstrip("-")
    after = digits.split(".")[1] if "." in digits else ""
    return len(digits.replace(".", "")) > 15 or len(after) >= 8


@given(st.lists(st.lists(plain_field(), min_size=4, max_size=4), min_size=1, max_size=40))
@settings(max_examples=300, deadline=None)
def test_equals_float_and_loadtxt(rows):
    body = "\n".join(",".join(r) for r in rows).encode() + b"\n"
    got = parse_plain(body, 4)
    ref = _floats(body, 4)
    if got is None:
        assert any(_declinable(f) for r in rows for f in r)
        return
    assert _same(got, ref)
    assert _same(got, np.loadtxt(io.BytesIO(body), delimiter=",", ndmin=2))


def test_worked_examples():
    # Values checked by hand against float() (Python 3.11, from memory of its repr).
    body = b"1793793600.100,-0.0290,1.0010,0\n.5,5.,-.5,-0\n"
    got = parse_plain(body, 4)
    assert got.tolist() == [[1793793600.1, -0.029, 1.001, 0.0], [0.5, 5.0, -0.5, -0.0]]
    assert math.copysign(1.0, got[1, 3]) == -1.0   # "-0" keeps its sign, as float("-0") does


def test_point_in_the_first_of_two_words():
    # 16 characters, the point 8 from the end: both words and the carry between them.
    body = b"04387455.4649984,123456789.123456,-1234567890123.4,0.123456\n"
    assert _same(parse_plain(body, 4), _floats(body, 4))


def test_no_final_newline():
    assert parse_plain(b"1,2,3,4\n5,6,7,8", 4).tolist() == [[1, 2, 3, 4], [5, 6, 7, 8]]


def test_long_body_read_in_pieces_equals_loadtxt():
    rng = np.random.default_rng(0)
    n = 3 * CHUNK_BYTES // 30
    t = 1793793600.0 + np.arange(n) / 10.0
    xyz = rng.normal(0.0, 0.05, (n, 3))
    body = "".join(f"{a:.3f},{x:.4f},{y:.4f},{z:.4f}\n" for a, (x, y, z) in zip(t, xyz, strict=True)).encode()
    assert len(body) > 2 * CHUNK_BYTES
    assert _same(parse_plain(body, 4), np.loadtxt(io.BytesIO(body), delimiter=",", ndmin=2))


def test_one_column():
    assert parse_plain(b"1.5\n-2\n", 1).tolist() == [[1.5], [-2.0]]


def test_n_cols_must_be_positive():
    with pytest.raises(ValueError, match="n_cols"):
        parse_plain(b"1\n", 0)


# Each form outside the plain one is declined (None), for the general parser to read or word.
def test_declines_empty_body():
    assert parse_plain(b"", 4) is None


def test_declines_exponent():
    assert parse_plain(b"1e3,2,3,4\n", 4) is None


def test_declines_plus_sign():
    assert parse_plain(b"+1,2,3,4\n", 4) is None


def test_declines_space():
    assert parse_plain(b"1, 2,3,4\n", 4) is None


def test_declines_carriage_return():
    assert parse_plain(b"1,2,3,4\r\n", 4) is None


def test_declines_nan():
    assert parse_plain(b"nan,2,3,4\n", 4) is None


def test_declines_empty_field():
    assert parse_plain(b"1,,3,4\n", 4) is None


def test_declines_blank_line():
    assert parse_plain(b"1,2,3,4\n\n5,6,7,8\n", 4) is None


def test_declines_rows_of_unequal_length():
    # 3 + 5 fields: the total is a multiple of 4, the rows are not.
    assert parse_plain(b"1,2,3\n4,5,6,7,8\n", 4) is None


def test_declines_two_points():
    assert parse_plain(b"1.2.3,2,3,4\n", 4) is None


def test_declines_two_points_in_different_words():
    assert parse_plain(b"1.23456789012.5,2,3,4\n", 4) is None


def test_declines_point_nine_or_more_from_the_end():
    assert parse_plain(b"0.123456789,2,3,4\n", 4) is None


def test_declines_inner_minus():
    assert parse_plain(b"1-5,2,3,4\n", 4) is None


def test_declines_lone_minus():
    assert parse_plain(b"-,2,3,4\n", 4) is None


def test_declines_lone_point():
    assert parse_plain(b".,2,3,4\n", 4) is None


def test_declines_slash():
    # '/' sits between '.' and '0' in ASCII: it must not read as a digit or a point.
    assert parse_plain(b"1/5,2,3,4\n", 4) is None


def test_declines_more_than_16_characters():
    assert parse_plain(b"12345678901234567,2,3,4\n", 4) is None


def test_declines_mantissa_of_2_pow_53():
    # 2**53 = 9007199254740992 (exact); 9007199254740993 is not a double.
    assert parse_plain(b"9007199254740993,2,3,4\n", 4) is None
    assert parse_plain(b"9007199254740991,2,3,4\n", 4)[0, 0] == 2.0 ** 53 - 1


@st.composite
def fixed_width_body(draw):
    """Rows as recorders write them: each column at one width (digits before and after the
    point), the sign free.  The reader's one-mask-per-column path, long columns included."""
    n_cols = draw(st.integers(1, 5))
    forms = [(draw(st.integers(1, 10)), draw(st.integers(0, 5))) for _ in range(n_cols)]
    n_rows = draw(st.integers(1, 30))
    rows = []
    for _ in range(n_rows):
        fields = []
        for left, right in forms:
            digits = draw(st.text(alphabet="0123456789", min_size=left + right, max_size=left + right))
            sign = draw(st.sampled_from(["", "-"]))
            fields.append(sign + digits[:left] + ("." + digits[left:] if right else ""))
        rows.append(",".join(fields))
    return "\n".join(rows).encode() + b"\n", n_cols


@given(fixed_width_body())
@settings(max_examples=300, deadline=None)
def test_fixed_width_columns_equal_float_and_loadtxt(case):
    body, n_cols = case
    got = parse_plain(body, n_cols)
    assert got is not None   # at most 15 characters and 5 decimals: always the plain form
    assert _same(got, _floats(body, n_cols))
    assert _same(got, np.loadtxt(io.BytesIO(body), delimiter=",", ndmin=2))


def test_columns_of_one_width_but_a_wider_row():
    # The first rows set each column's width; a wider field further down takes the
    # per-field masks (float() reference).
    body = b"1.5,-2.25,3\n1.5,-2.25,3\n12345678.5,-2.25,30\n"
    assert _same(parse_plain(body, 3), _floats(body, 3))


def test_start_skips_the_bytes_before_the_body():
    head = b"# unit=g\ntime,x,y,z\n"
    body = b"".join(b"%d.5,-0.25,0.125,1\n" % i for i in range(20_000))
    assert len(body) > CHUNK_BYTES   # read in pieces from the offset
    assert _same(parse_plain(head + body, 4, start=len(head)), parse_plain(body, 4))
    assert _same(parse_plain(head + b"1,2,3,4\n", 4, start=len(head)), _floats(b"1,2,3,4\n", 4))


@pytest.mark.parametrize("start", [-1, 10**6, 1.5])
def test_start_must_be_an_offset_into_the_body(start):
    with pytest.raises(ValueError, match="start"):
        parse_plain(b"1,2,3,4\n", 4, start=start)
