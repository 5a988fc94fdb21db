"""A fast reader for CSV bodies of plain decimal numbers, in numpy, over bytes.

The accelerometry recorders write rows such as ``1793793600.100,-0.0290,1.0010``:
an optional leading ``-``, digits, at most one decimal point.  For that plain
form this module parses the whole body with a few dozen vectorised numpy
operations instead of one C call per field, and returns exactly the floats
Python's :func:`float` (and :func:`numpy.loadtxt`) give: each field is read as
an integer mantissa ``M < 2**53`` and a count ``k`` of digits after the point,
and ``M / 10**k`` is one correctly rounded IEEE 754 division of two exactly
representable numbers (Clinger's fast path; W. D. Clinger, "How to read
floating point numbers accurately", PLDI 1990).

Anything outside the plain form (an exponent, a ``+``, spaces, ``nan``, a
carriage return, an empty field, a row with the wrong number of fields, more
than 16 characters after the sign, a mantissa of 2**53 or more, ...) makes
:func:`parse_plain` return ``None``; the caller then uses its general parser,
which also words the error for bad input.  This module never decides whether a
file is valid: it is only a faster way to read the files that are.

How a field is read (SIMD within a register, "SWAR", in numpy ``uint64``
lanes): the 8 bytes that end at the field's separator are loaded as one
little-endian word, so the field is right-aligned and its first character is
the lowest byte in use; bytes before the field (and a leading ``-``) are masked
off; ``XOR 0x30`` turns each digit character into its value and the point into
``0x1E``, which a per-byte add of ``0x76`` flags in its top bit; the point byte
is cleared, the digits before it move up one byte, and three
multiply-shift-mask rounds combine the 8 digit bytes into their integer value.
Fields of 9 to 16 characters use a second word for the characters before the
last 8.
"""

from __future__ import annotations

import numpy as np

# After an optional leading '-': at most this many characters (digits and the point).
MAX_CHARS = 16
# Mantissas below 2**53 are exact doubles (IEEE 754 binary64, 53-bit significand).
_EXACT = 2 ** 53

_U = np.uint64
_ASCII_ZERO = _U(0x3030303030303030)
_TOP_BITS = _U(0x8080808080808080)
_OVER_NINE = _U(0x7676767676767676)   # per byte: x + 0x76 >= 0x80 exactly when x >= 10
_BYTE = _U(8)
_ONE = _U(1)
# _KEEP[n]: the top n bytes of a little-endian word (the n characters before the separator).
_KEEP = np.array([0] + [(0xFFFFFFFFFFFFFFFF << (8 * (8 - n))) & 0xFFFFFFFFFFFFFFFF for n in range(1, 9)],
                 dtype=np.uint64)
_POW10 = 10.0 ** np.arange(17)
_PAD = 16
# Bytes per piece of a long body (whole lines): the working set stays in a 256 KiB L2 cache.
CHUNK_BYTES = 1 << 17
_PAD_BYTES = b"0" * _PAD


def _words_at(buf: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """The little-endian ``uint64`` of the 8 bytes at each offset of ``buf`` (unaligned)."""
    view = np.ndarray(shape=(buf.size - 7,), dtype="<u8", buffer=buf, strides=(1,))
    return view[offsets]


def _eight_digits(x: np.ndarray) -> np.ndarray:
    """Digit values in the 8 bytes of each word (first in memory most significant) to an integer.

    Each round adds every other lane, times its radix, to its neighbour:
    ``(x * (r << s | 1)) >> s`` is ``r * x + (x >> s)``; the carry out of the top lane is
    masked away (common practice, no source).
    """
    x = ((x * _U(10 << 8 | 1)) >> _U(8)) & _U(0x00FF00FF00FF00FF)
    x = ((x * _U(100 << 16 | 1)) >> _U(16)) & _U(0x0000FFFF0000FFFF)
    return ((x * _U(10000 << 32 | 1)) >> _U(32)) & _U(0xFFFFFFFF)


def _digit_word(buf: np.ndarray, ends: np.ndarray, keep: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Digit bytes and point flag of the characters before each of ``ends``.

    ``keep`` is :data:`_KEEP` of the number of characters (0-8) to take, one
    word per field or one per column (broadcast).  Returns ``(x, flag)``: ``x``
    holds each character's digit value in its byte (0 outside the field;
    ``0x1E`` at the point); ``flag`` has bit ``8 i + 7`` set where byte ``i``
    is the point.
    """
    x = _words_at(buf, ends - 8) ^ _ASCII_ZERO
    x &= keep
    return x, (x + _OVER_NINE) & _TOP_BITS


def _below(flag: np.ndarray) -> np.ndarray:
    """Mask of the bytes below the point (all zero where there is no point)."""
    point = flag >> _U(7)
    return point - (point != 0)


def _exponents(flag: np.ndarray) -> np.ndarray:
    """Characters after the point: ``7 - i`` for the point in byte ``i``, 0 without a point.

    The flag is bit ``8 i + 7``, and :func:`numpy.frexp` of ``2**(8 i + 7)`` has exponent ``8 i + 8``.
    """
    _, e = np.frexp(flag.astype(np.float64))
    return np.where(flag != 0, 8 - e // 8, 0)


def parse_plain(body: bytes, n_cols: int, *, start: int = 0) -> np.ndarray | None:
    """Rows of ``n_cols`` plain decimals as an ``(n, n_cols)`` float64 array, or ``None``.

    Long bodies are read in pieces of about :data:`CHUNK_BYTES` whole lines, so the
    working arrays of each piece stay in the processor's cache (measured about
    1.2-2x faster than one pass over a 6-hour file; ``docs/features.md``).

    Parameters
    ----------
    body : bytes
        Lines separated by ``\\n`` (a final newline is optional), fields by ``,``.
    n_cols : int
        Fields expected on every line.
    start : int, optional
        Offset of the first line in ``body`` (the bytes before it are ignored), so a
        caller need not copy the body out of a file's bytes.

    Returns
    -------
    numpy.ndarray or None
        The values, bit for bit what :func:`float` gives for each field; ``None``
        when any part of ``body`` is not in the plain form described in the
        module docstring (the caller falls back to a general parser).
    """
    if not isinstance(n_cols, int) or n_cols < 1:
        raise ValueError(f"n_cols must be a positive integer, got {n_cols!r}")
    if not isinstance(start, int) or not 0 <= start <= len(body):
        raise ValueError(f"start must be an offset into body, got {start!r}")
    if len(body) - start <= CHUNK_BYTES:
        return _parse_piece(body[start:] if start else body, n_cols)
    pieces = []
    pos, n = start, len(body)
    while pos < n:
        end = body.find(b"\n", min(pos + CHUNK_BYTES, n - 1))
        end = n if end < 0 else end + 1
        piece = _parse_piece(body[pos:end], n_cols)
        if piece is None:
            return None
        pieces.append(piece)
        pos = end
    return np.concatenate(pieces)


def _parse_piece(body: bytes, n_cols: int) -> np.ndarray | None:
    """:func:`parse_plain` on one piece of whole lines."""
    if not body:
        return None
    # Pad in front, so the 16 bytes before every field exist; the pad is digits and
    # no field reaches into it (each field is bounded by its separators).
    buf = np.frombuffer(_PAD_BYTES + body + (b"" if body.endswith(b"\n") else b"\n"), np.uint8)
    # Only digits, '.', '-', ',' and '\n' (the only two of them at or below ',' = 44).
    n_minus = int(np.count_nonzero(buf == 45))
    flat_seps: np.ndarray = np.flatnonzero(buf <= 44)
    n_rows = int(np.count_nonzero(buf == 10))
    if (int(np.count_nonzero((buf - np.uint8(48)) < 10)) + int(np.count_nonzero(buf == 46))
            + n_minus + flat_seps.size != buf.size) or flat_seps.size != n_rows * n_cols:
        return None
    seps = flat_seps.reshape(n_rows, n_cols)
    # Each row ends at a newline; there are as many newlines as rows, so every
    # other separator is a comma.
    if (buf[seps[:, -1]] != 10).any():
        return None
    # A field starts one byte after the separator before it (the first after the pad).
    starts = np.empty_like(seps)
    flat_starts = starts.reshape(-1)
    flat_starts[0] = _PAD - 1
    flat_starts[1:] = flat_seps[:-1]
    flat_starts += 1
    neg = buf[starts] == 45
    if int(np.count_nonzero(neg)) != n_minus:
        return None   # a '-' that does not lead its field
    n_chars = seps - starts - neg
    shortest = int(n_chars.min())
    longest = int(n_chars.max())
    if shortest < 1 or longest > MAX_CHARS:
        return None
    # Recorders usually write every column at one width (the sign apart): then the
    # masks are one word per column.
    width = n_chars[0]
    same_width = bool((n_chars == width).all())
    x, flag = _digit_word(buf, seps, _KEEP[np.minimum(width if same_width else n_chars, 8)])
    if (flag & (flag - _ONE)).any():
        return None   # two points among the last 8 characters
    if shortest == 1 and ((n_chars == 1) & (flag != 0)).any():
        return None   # a point and no digit
    # The common case: in each column the point is the same number of characters from
    # the end in every row (fixed decimals), so the masks are one word per column.
    first = flag[0]
    fixed = bool((flag == first).all())
    if fixed:
        x &= ~((first >> _U(7)) * _U(0xFF))   # clear the point
        below = _below(first)
    else:
        x &= ~((flag >> _U(7)) * _U(0xFF))
        below = _below(flag)
    long_cols: list[int] = []
    if longest > 8:
        long_cols = ([c for c in range(n_cols) if width[c] > 8] if same_width
                     else [c for c in range(n_cols) if n_chars[:, c].max() > 8])
    hx = None
    if long_cols:
        n_high = np.clip((width if same_width else n_chars)[..., long_cols] - 8, 0, 8)
        hx, hflag = _digit_word(buf, seps[:, long_cols] - 8, _KEEP[n_high])
        if hflag.any():
            return None   # a point 9 or more characters from the end: left to the general parser
        # Where there is a point, the top byte of the earlier word moves into the lowest
        # byte of the later one as the characters before the point move up one byte.
        lflag = first[long_cols] if fixed else flag[:, long_cols]
        hx_shift = np.where(lflag != 0, _BYTE, _U(0))
        carry = np.where(lflag != 0, hx >> _U(56), _U(0))
        hx = hx << hx_shift
    x += (x & below) * _U(255)
    if hx is not None:
        x[:, long_cols] |= carry
    m = _eight_digits(x)
    if hx is not None:
        m[:, long_cols] += _eight_digits(hx) * _U(100_000_000)
    if int(m.max()) >= _EXACT:
        return None
    val = m.astype(np.float64)
    val /= _POW10[_exponents(first) if fixed else _exponents(flag)]
    if n_minus:
        # The sign of 0.5 - 1 on the negative fields; "-0" reads -0.0, as float("-0") does.
        np.copysign(val, 0.5 - neg, out=val)
    return val
