"""Helpers shared by the readers: time parsing and plausibility, rejection."""

from __future__ import annotations

from typing import NoReturn

import math
import re
import time
from datetime import datetime, UTC

from ...errors import RejectedInput

# 2000-01-01T00:00:00Z: no recorder in this study predates it, and a zero or
# small epoch value is the usual sign of an unset clock.
EARLIEST_T = 946684800.0
# A recorder's clock may run a little ahead of the laptop's.
FUTURE_SKEW_S = 600.0

_STAMP = re.compile(r"(\d{4})(\d{2})(\d{2})T(\d{2})(\d{2})(\d{2})Z")


def reject(path, reason: str, detail: str) -> NoReturn:
    """Raise :class:`~agent.errors.RejectedInput`; details never carry content."""
    raise RejectedInput(path, reason, detail)


def now_or(now: float | None) -> float:
    return time.time() if now is None else float(now)


def plausible_time(t: float, now: float) -> str | None:
    """``None`` if ``t`` is a believable recording time, else why not."""
    if not math.isfinite(t):
        return "not a finite time"
    if t < EARLIEST_T:
        return "before 2000-01-01 (an unset clock?)"
    if t > now + FUTURE_SKEW_S:
        return f"more than {FUTURE_SKEW_S:.0f} s in the future"
    return None


def parse_iso(text: str) -> float:
    """ISO 8601 date-time with ``Z`` or an offset to Unix seconds.

    Raises ``ValueError`` for anything else, including a time without a zone:
    a naive time cannot be placed on the study's clock.
    """
    s = text.strip()
    if not s or len(s) > 40:
        raise ValueError("not an ISO 8601 time")
    dt = datetime.fromisoformat(s)
    if dt.tzinfo is None or dt.utcoffset() is None:
        raise ValueError("time has no 'Z' or UTC offset")
    return dt.timestamp()


def stamp_from_name(path) -> float | None:
    """Recording start from ``YYYYMMDDTHHMMSSZ`` anywhere in the file stem."""
    base = str(path).replace("\\", "/").rsplit("/", 1)[-1]
    m = _STAMP.search(base)
    if not m:
        return None
    y, mo, d, h, mi, s = (int(g) for g in m.groups())
    try:
        return datetime(y, mo, d, h, mi, s, tzinfo=UTC).timestamp()
    except ValueError:
        return None


def decode_text(path, data: bytes) -> str:
    """UTF-8 text (a BOM is tolerated); anything else is not our format."""
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as e:
        reject(path, "not_text", f"not UTF-8 text (invalid byte at offset {e.start})")
