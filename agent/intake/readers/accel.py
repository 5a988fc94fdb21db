"""Accelerometry bursts: ``*.accel.csv`` parsed in one vectorised pass.

Format (``docs/inbox-formats.md``)::

    # unit=g rate_hz=10
    time,x,y,z
    1793800800.000,0.012,-0.031,0.998
    ...

The body is read by :func:`~agent.intake.readers.plaincsv.parse_plain`, a
vectorised reader for plain decimals that returns exactly what :func:`float`
gives; a body it does not handle (an exponent, a carriage return, ...) goes to
:func:`numpy.loadtxt`, which also words the errors (see ``docs/features.md``).  Values in m/s²
are converted to g with standard gravity g_n = 9.80665 m/s² (3rd CGPM, 1901).
"""

from __future__ import annotations

import io
import struct
import warnings as _warnings
from dataclasses import dataclass, field

import numpy as np

from ._common import now_or, plausible_time, reject, stamp_from_name
from .plaincsv import parse_plain

STANDARD_GRAVITY = 9.80665  # m/s², 3rd CGPM (1901)
UNITS = {"g": 1.0, "m/s^2": 1.0 / STANDARD_GRAVITY}
# A sensor that includes gravity reads about 1 g at rest; a median magnitude far
# from that means the declared unit is wrong (m/s² labelled g reads ~9.8).
MAGNITUDE_RANGE_G = (0.3, 3.0)
# Bodies at least this long go to the vectorised plain-decimal reader (measured
# break-even with numpy.loadtxt, by CPU time, near 30 KB or 800 rows; docs/features.md).
PLAIN_MIN_BYTES = 32 * 1024
# An interval longer than this many nominal sample periods is a gap.
GAP_FACTOR = 2.0


@dataclass
class AccelRecord:
    path: str
    t: np.ndarray          # Unix seconds, strictly increasing
    xyz_g: np.ndarray      # (n, 3) in g
    rate_hz: float         # measured: 1 / median interval
    warnings: list[str] = field(default_factory=list)
    dropped: dict[str, int] = field(default_factory=dict)
    mag_g: np.ndarray | None = None   # vector magnitude, if already computed


def parse_unit_line(path, line: bytes) -> tuple[float, float | None]:
    """``(scale to g, declared rate or None)`` from ``# unit=… [rate_hz=…]``."""
    s = line.decode("utf-8", "replace").strip()
    if not s.startswith("#"):
        reject(path, "bad_unit", "the first line must declare the unit: '# unit=g' or '# unit=m/s^2'")
    opts = {}
    for tok in s[1:].split():
        k, eq, v = tok.partition("=")
        if eq:
            opts[k.strip().lower()] = v.strip()
    unit = opts.get("unit")
    if unit not in UNITS:
        reject(path, "bad_unit", "unit must be 'g' or 'm/s^2'"
               + (" (none declared)" if unit is None else ""))
    rate = None
    if "rate_hz" in opts:
        try:
            rate = float(opts["rate_hz"])
        except ValueError:
            rate = float("nan")
        if not (np.isfinite(rate) and rate > 0):
            reject(path, "bad_rate", "rate_hz must be a positive number")
    return UNITS[unit], rate


def _loadtxt(path, body: bytes, *, first_line: int = 3) -> np.ndarray:
    """The general parser: any number form :func:`float` accepts; words the errors.

    ``first_line`` is the file line number of the body's first line (after the
    unit and header lines), so an error names the line a person would open.
    """
    try:
        with _warnings.catch_warnings():
            _warnings.simplefilter("ignore", UserWarning)  # "input contained no data"
            arr = np.loadtxt(io.BytesIO(body), delimiter=",", dtype=np.float64, ndmin=2,
                             comments=None)
    except ValueError:
        reject(path, "bad_value", _first_bad_line(body, first_line) or "a row is not four numbers")
    if arr.shape[0] >= 2:  # fewer is too_short, checked first by the caller
        if arr.shape[1] != 4:
            reject(path, "bad_value",
                   _first_bad_line(body, first_line) or f"rows have {arr.shape[1]} values, expected 4 (time,x,y,z)")
        if not np.isfinite(arr).all():
            reject(path, "bad_value", _first_bad_line(body, first_line) or "a value is NaN or infinite")
    return arr


_COLUMNS = ("time", "x", "y", "z")


def _first_bad_line(body: bytes, first_line: int) -> str | None:
    """Where and why the first line that is not four finite numbers fails, without its content.

    Only on the error path: one :func:`float` per field, lines split as
    :func:`numpy.loadtxt` splits them (``\n``, ``\r\n`` or ``\r``), blank lines
    skipped as it skips them.
    """
    for i, line in enumerate(body.splitlines()):
        if not line.strip():
            continue
        fields = line.split(b",")
        where = f"line {first_line + i}"
        if len(fields) != len(_COLUMNS):
            return f"{where} has {len(fields)} values, expected 4 (time,x,y,z)"
        for name, f in zip(_COLUMNS, fields, strict=True):
            try:
                v = float(f)
            except ValueError:
                return f"{where}: the {name} value is not a number"
            if b"_" in f:
                return f"{where}: the {name} value is not a plain number (underscore)"
            if not np.isfinite(v):
                return f"{where}: the {name} value is NaN or infinite"
    return None


def read_accel(path, data: bytes, policy, *, now: float | None = None) -> AccelRecord:
    """Parse and validate one burst."""
    now = now_or(now)
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]  # a UTF-8 byte-order mark some editors add
    # The two first lines are found, not split off: the body is read in place.
    unit_end = data.find(b"\n")
    header_end = data.find(b"\n", unit_end + 1) if unit_end >= 0 else -1
    if header_end < 0:
        reject(path, "too_short", "expected a unit line, a header line and samples")
    scale, declared = parse_unit_line(path, data[:unit_end])
    header_line = data[unit_end + 1:header_end].decode("utf-8", "replace")
    header = tuple(h.strip().lower() for h in header_line.strip().split(","))
    if header != ("time", "x", "y", "z"):
        reject(path, "bad_header", "expected the header 'time,x,y,z'")
    # Plain decimals are always finite and four to a row; anything else goes to loadtxt,
    # as do short bodies, where loadtxt's single C call is the faster (docs/features.md).
    body_start = header_end + 1
    arr = parse_plain(data, 4, start=body_start) if len(data) - body_start >= PLAIN_MIN_BYTES else None
    if arr is None:
        arr = _loadtxt(path, data[body_start:])
    if arr.shape[0] < 2:
        reject(path, "too_short", f"{arr.shape[0]} sample(s); at least two are needed")
    t = arr[:, 0]
    dt = t[1:] - t[:-1]   # np.diff, without its Python-level overhead
    if not (dt > 0).all():
        reject(path, "bad_timestamp", "times are not strictly increasing")
    for edge in (t[0], t[-1]):
        why = plausible_time(float(edge), now)
        if why:
            reject(path, "bad_timestamp", f"a sample time is {why}")
    rate = 1.0 / _median(dt)
    _check_rate(path, policy, declared=declared, measured=rate)
    xyz = arr[:, 1:4] * scale if scale != 1.0 else arr[:, 1:4]   # a view: no copy of the samples
    mag = _checked_magnitude(path, xyz)
    warnings, dropped = [], {}
    want = float(policy.schedule.accel_rate_hz)
    gaps = dt > GAP_FACTOR / want
    if gaps.any():
        n_gaps = int(gaps.sum())
        lost = float(np.sum(dt[gaps] - 1.0 / want))
        dropped["gap"] = n_gaps
        warnings.append(f"{n_gaps} gap(s) in the samples, about {lost:.1f} s missing")
    return AccelRecord(path=str(path), t=t, xyz_g=xyz, rate_hz=rate,
                       warnings=warnings, dropped=dropped, mag_g=mag)


def _median(x: np.ndarray) -> float:
    """``float(np.median(x))`` of a non-empty 1-d array, by partition (without np.median's overhead)."""
    n = x.size
    k = n // 2
    if n % 2:
        return float(np.partition(x, k)[k])
    p = np.partition(x, (k - 1, k))
    return float((p[k - 1] + p[k]) / 2.0)


def _check_rate(path, policy, *, declared: float | None, measured: float) -> None:
    want = float(policy.schedule.accel_rate_hz)
    tol = float(policy.intake.accel_rate_tolerance)
    for label, r in (("declared", declared), ("measured", measured)):
        if r is not None and abs(r - want) > tol * want:
            reject(path, "bad_rate",
                   f"{label} rate {r:.3g} Hz is outside schedule.accel_rate_hz = {want:g} Hz "
                   f"± {tol:.0%} (intake.accel_rate_tolerance)")


def median_within(x: np.ndarray, lo: float, hi: float) -> bool:
    """``lo <= float(np.median(x)) <= hi`` for a non-empty 1-d array without NaN, by counting.

    The median averages the order statistics ``(n - 1) // 2`` and ``n // 2``
    (one and the same for odd ``n``).  Both are at least ``lo`` exactly when
    at most ``(n - 1) // 2`` values are below ``lo``, and both at most ``hi``
    exactly when at most ``n - 1 - n // 2`` values are above ``hi``; if both
    hold, so does the median (the mean of two numbers in ``[lo, hi]``).  Only
    when a count fails is the median computed, because two order statistics on
    either side of a limit can still average inside it.  Two counting passes
    instead of a partition: about a tenth of the time on a 6-hour burst
    (tested against :func:`numpy.median`).
    """
    n = x.size
    if np.count_nonzero(x < lo) <= (n - 1) // 2 and np.count_nonzero(x > hi) <= n - 1 - n // 2:
        return True
    return lo <= _median(x) <= hi


def _checked_magnitude(path, xyz_g: np.ndarray) -> np.ndarray:
    """Vector magnitude in g; ``bad_unit`` when its median is not what gravity reads."""
    mag = np.sqrt(np.einsum("ij,ij->i", xyz_g, xyz_g))
    lo, hi = MAGNITUDE_RANGE_G
    if not median_within(mag, lo, hi):
        reject(path, "bad_unit",
               f"the median magnitude is not within {lo:g}–{hi:g} g, as a device sensing "
               "gravity reads; is the declared unit right?")
    return mag


# ---------------------------------------------------------------------------
# The binary burst: *.accel.wav (docs/inbox-formats.md)
# ---------------------------------------------------------------------------
WAVE_FORMAT_IEEE_FLOAT = 0x0003     # Microsoft, "Multimedia Programming Interface and Data Specifications 1.0"
WAVE_FORMAT_EXTENSIBLE = 0xFFFE     # Microsoft, WAVEFORMATEXTENSIBLE
# KSDATAFORMAT_SUBTYPE_IEEE_FLOAT, 00000003-0000-0010-8000-00aa00389b71, as stored (mixed-endian GUID).
_SUBTYPE_IEEE_FLOAT = bytes.fromhex("0300000000001000800000aa00389b71")
WAV_CHANNELS = 3                    # x, y, z
_WAV_FORMAT_HELP = "expected a RIFF/WAVE file of 32-bit IEEE float samples in 3 channels (x, y, z in g)"


def read_accel_wav(path, data: bytes, policy, *, now: float | None = None) -> AccelRecord:
    """Read and validate one binary burst: WAV, 32-bit float, 3 channels (x, y, z) in g.

    The WAV sample rate is the recording rate; the start time is the UTC stamp
    ``YYYYMMDDTHHMMSSZ`` in the file name, as for audio snippets; sample ``i``
    was taken at ``start + i / rate``.  The samples are read in place with
    :func:`numpy.frombuffer`: no text to parse.
    """
    now = now_or(now)
    if len(data) < 12 or data[:4] != b"RIFF" or data[8:12] != b"WAVE":
        reject(path, "bad_header", _WAV_FORMAT_HELP)
    fmt = None
    body = size = None
    pos = 12
    while pos + 8 <= len(data):
        cid = data[pos:pos + 4]
        (csize,) = struct.unpack_from("<I", data, pos + 4)
        start = pos + 8
        if cid == b"fmt ":
            if csize < 16 or start + csize > len(data):
                reject(path, "bad_header", "the WAV fmt chunk is cut short")
            fmt = struct.unpack_from("<HHIIHH", data, start)
            if fmt[0] == WAVE_FORMAT_EXTENSIBLE and (csize < 40 or data[start + 24:start + 40] != _SUBTYPE_IEEE_FLOAT):
                reject(path, "bad_header", _WAV_FORMAT_HELP)
        elif cid == b"data":
            body, size = start, csize
            break
        pos = start + csize + (csize & 1)   # chunks are padded to even length
    if fmt is None or body is None or size is None:
        reject(path, "bad_header", "the WAV has no fmt chunk before its data chunk")
    tag, channels, rate_hz, _, block_align, bits = fmt
    if tag not in (WAVE_FORMAT_IEEE_FLOAT, WAVE_FORMAT_EXTENSIBLE) or bits != 32 or channels != WAV_CHANNELS \
            or block_align != 4 * WAV_CHANNELS:
        reject(path, "bad_header", _WAV_FORMAT_HELP)
    if rate_hz <= 0:
        reject(path, "bad_rate", "the WAV sample rate is zero")
    if size in (0, 0xFFFFFFFF) or size > len(data) - body:
        reject(path, "truncated", f"the WAV data chunk claims {size} bytes but {len(data) - body} are present")
    n = size // block_align
    if n < 2:
        reject(path, "too_short", f"{n} sample(s); at least two are needed")
    xyz = np.frombuffer(data, dtype="<f4", count=n * WAV_CHANNELS, offset=body).reshape(n, WAV_CHANNELS)
    if not np.isfinite(xyz).all():
        reject(path, "bad_value", "a value is NaN or infinite")
    t0 = stamp_from_name(path)
    if t0 is None:
        reject(path, "bad_timestamp", "the file name carries no start time YYYYMMDDTHHMMSSZ")
    rate = float(rate_hz)
    t = t0 + np.arange(n) / rate
    for edge in (t[0], t[-1]):
        why = plausible_time(float(edge), now)
        if why:
            reject(path, "bad_timestamp", f"a sample time is {why}")
    _check_rate(path, policy, declared=None, measured=rate)
    xyz = xyz.astype(np.float64)
    mag = _checked_magnitude(path, xyz)
    return AccelRecord(path=str(path), t=t, xyz_g=xyz, rate_hz=rate, mag_g=mag)
