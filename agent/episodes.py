"""One episode record per local clock hour of the participant's life.

An *episode* summarises one local clock hour (``docs/graph.md``, Episodes):
time of day, weekday, study week, the dominant place, sound and motion codes and
the moods present, with coverage flags.  Local time comes only from the
participant's IANA zone through :mod:`zoneinfo`.

Daylight saving time is handled by construction: we walk UTC instants on a
15-minute grid (every offset in the tz database since 1980 is a multiple of 15
minutes) and keep those where the *local* clock reads ``HH:00:00``.  Each such
instant starts a local clock hour that lasts until the next one.  So

* the skipped spring hour (local 01:00 in Europe/London on 2026-03-29) is
  never read on the clock and yields no episode (23 that day);
* the repeated autumn hour (local 01:00 on 2026-10-25) is read twice, at
  00:00 and 01:00 UTC, and yields two episodes whose keys differ in the offset
  (``2026-10-25T01:00+01:00`` and ``2026-10-25T01:00+00:00``; 25 that day).

Pure functions work on lists of ``coded`` rows and mood reports so they can be
tested without a vault; :func:`build_episodes` does the vault I/O.
"""

from __future__ import annotations

import bisect
import math
import time as _time
from collections import Counter
from datetime import date, datetime, tzinfo, UTC
from collections.abc import Iterable, Mapping, Sequence
from zoneinfo import ZoneInfo

from .errors import LetheError
from .graph import label_key

GRID_S = 900  # 15 minutes


def _floor(t: float, step: int) -> int:
    return int(math.floor(t / step) * step)


def local_hour_starts(tz: tzinfo, start_utc: float, end_utc: float) -> list[tuple[int, datetime]]:
    """UTC starts and local datetimes of the local clock hours starting in ``[start_utc, end_utc)``."""
    out = []
    t = _floor(start_utc, GRID_S)
    if t < start_utc:
        t += GRID_S
    while t < end_utc:
        loc = datetime.fromtimestamp(t, tz)
        if loc.minute == 0 and loc.second == 0:
            out.append((t, loc))
        t += GRID_S
    return out


def hour_key(local: datetime) -> str:
    """``YYYY-MM-DDTHH:00±HH:MM``: the local start with its offset."""
    return local.isoformat(timespec="minutes")


def study_week(local_day: date, start_day: date) -> int:
    """1-based study week; days before the start count as week 1."""
    return max((local_day - start_day).days // 7 + 1, 1)


def _overlap(a0, a1, b0, b1) -> float:
    return max(0.0, min(a1, b1) - max(a0, b0))


def _mode(labels: Iterable[str]):
    c = Counter(labels)
    if not c:
        return None
    # most frequent; ties go to the natural-order first label (deterministic)
    return min(c.items(), key=lambda kv: (-kv[1], label_key(kv[0])))[0]


class _Intervals:
    """Coded rows of one kind sorted by start, for hour look-ups."""

    def __init__(self, rows: Sequence[Mapping]):
        self.rows = sorted(rows, key=lambda r: (float(r["t"]), float(r["t_end"])))
        self.starts = [float(r["t"]) for r in self.rows]
        self.max_len = max((float(r["t_end"]) - float(r["t"]) for r in self.rows), default=0.0)

    def overlapping(self, a: float, b: float):
        lo = bisect.bisect_left(self.starts, a - self.max_len)
        hi = bisect.bisect_left(self.starts, b)
        for r in self.rows[lo:hi]:
            if float(r["t_end"]) > a and float(r["t"]) < b:
                yield r

    def starting_in(self, a: float, b: float):
        lo = bisect.bisect_left(self.starts, a)
        hi = bisect.bisect_left(self.starts, b)
        return self.rows[lo:hi]


def _candidate_span(coded, moods):
    ts = [float(r["t"]) for r in coded] + [float(m["t"]) for m in moods]
    te = [float(r["t_end"]) for r in coded] + [float(m["t"]) for m in moods]
    if not ts:
        return None
    return min(ts), max(te)


def episodes_from_codes(coded: Sequence[Mapping], moods: Sequence[Mapping], *, tz: tzinfo | str,
                        emotions: Sequence[str], mood_present_at: int,
                        mood_window_minutes: float, study_start_utc: float | None = None,
                        now: float | None = None) -> list[dict]:
    """Episode records for every complete local clock hour that has data.

    Parameters
    ----------
    coded : sequence of dict
        ``{"kind": "place"|"sound"|"motion", "t", "t_end", "id"}`` rows.
    moods : sequence of dict
        ``{"t", "ratings": {emotion: int}}`` mood reports.
    tz : tzinfo or str
        The participant's IANA zone.
    emotions : sequence of str
        Emotions that may become mood nodes (the policy's list, in its order).
    mood_present_at : int
        A rating at or above this marks an emotion present.
    mood_window_minutes : float
        The nearest prompt within this many minutes of the hour's middle sets
        the moods.
    study_start_utc : float, optional
        Start of study week 1; defaults to the first data time.
    now : float, optional
        Only hours that end at or before ``now`` become episodes; default: the clock.

    Returns
    -------
    list of dict
        Sorted by ``utc``.  An hour becomes an episode if it has any coded row
        overlapping it or a mood prompt inside it; an hour with no data at all
        yields no episode.
    """
    if isinstance(tz, str):
        tz = ZoneInfo(tz)
    now = _time.time() if now is None else float(now)
    if mood_window_minutes <= 0:
        raise ValueError(f"mood_window_minutes must be > 0, got {mood_window_minutes!r}")
    for r in coded:
        if r.get("kind") not in ("place", "sound", "motion"):
            raise ValueError(f"coded row kind {r.get('kind')!r}: expected 'place', 'sound' or 'motion'")
    span = _candidate_span(coded, moods)
    if span is None:
        return []
    if study_start_utc is None:
        study_start_utc = span[0]
    start_day = datetime.fromtimestamp(study_start_utc, tz).date()
    by_kind = {k: _Intervals([r for r in coded if r["kind"] == k]) for k in ("place", "sound", "motion")}
    mood_list = sorted(moods, key=lambda m: float(m["t"]))
    mood_t = [float(m["t"]) for m in mood_list]
    window_s = float(mood_window_minutes) * 60.0
    emotions = list(emotions)

    # one hour of slack each side: hours are at most 2 h long (DST) and start on the grid
    starts = local_hour_starts(tz, span[0] - 7200, span[1] + 7200)
    out = []
    for (t0, loc), nxt in zip(starts, starts[1:] + [None], strict=False):
        t1 = nxt[0] if nxt is not None else t0 + 3600
        if nxt is None or t1 > now:
            break  # the last start has no known end inside the span; incomplete hours wait
        place_s: dict[str, float] = {}
        gps_s = 0.0
        for r in by_kind["place"].overlapping(t0, t1):
            s = _overlap(t0, t1, float(r["t"]), float(r["t_end"]))
            gps_s += s
            if r.get("id") is not None:
                place_s[str(r["id"])] = place_s.get(str(r["id"]), 0.0) + s
        sounds = [str(r["id"]) for r in by_kind["sound"].starting_in(t0, t1) if r.get("id") is not None]
        audio_n = len(by_kind["sound"].starting_in(t0, t1))
        motion_rows = list(by_kind["motion"].overlapping(t0, t1))
        accel_s = sum(_overlap(t0, t1, float(r["t"]), float(r["t_end"])) for r in motion_rows)
        motions = [str(r["id"]) for r in by_kind["motion"].starting_in(t0, t1) if r.get("id") is not None]
        mid = (t0 + t1) / 2.0
        prompt = _nearest(mood_list, mood_t, mid, window_s)
        prompt_inside = bisect.bisect_left(mood_t, t1) > bisect.bisect_left(mood_t, t0)
        if gps_s <= 0 and audio_n == 0 and accel_s <= 0 and not prompt_inside:
            continue
        place = None
        if place_s:
            place = min(place_s.items(), key=lambda kv: (-kv[1], label_key(kv[0])))[0]
        moods_present = []
        if prompt is not None:
            ratings = prompt.get("ratings") or {}
            moods_present = [e for e in emotions
                             if isinstance(ratings.get(e), (int, float)) and ratings[e] >= mood_present_at]
        day = loc.date()
        out.append({
            "key": hour_key(loc),
            "utc": float(t0),
            "date": day.isoformat(),
            "hour": loc.hour,
            "weekday": loc.weekday(),
            "week": study_week(day, start_day),
            "place": place,
            "sound": _mode(sounds),
            "motion": _mode(motions),
            "moods": moods_present,
            "coverage": {"gps_s": round(min(gps_s, t1 - t0), 3), "audio_n": audio_n,
                         "accel_s": round(min(accel_s, t1 - t0), 3), "mood": prompt is not None},
        })
    return out


def _nearest(moods, mood_t, mid, window_s):
    if not moods:
        return None
    i = bisect.bisect_left(mood_t, mid)
    best = None
    for j in (i - 1, i):
        if 0 <= j < len(moods):
            d = abs(mood_t[j] - mid)
            if d <= window_s and (best is None or d < best[0]):  # ties: the earlier prompt
                best = (d, moods[j])
    return best[1] if best else None


def episodes_from_policy(coded, moods, policy, tz, study_start_utc=None, now=None) -> list[dict]:
    """:func:`episodes_from_codes` with the parameters taken from ``policy``."""
    return episodes_from_codes(
        coded, moods, tz=tz, emotions=policy.schedule.emotions,
        mood_present_at=policy.schedule.mood_present_at,
        mood_window_minutes=policy.episodes.mood_window_minutes,
        study_start_utc=study_start_utc, now=now)


# -- vault I/O ------------------------------------------------------------------

def _parse_time(value) -> float | None:
    if value is None:
        return None
    if isinstance(value, (int, float)):
        return float(value)
    try:
        dt = datetime.fromisoformat(str(value).replace("Z", "+00:00"))
    except ValueError:
        return None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=UTC)
    return dt.timestamp()


def study_start(home) -> float | None:
    """Enrolment time from the home config (``enrolled_at``, ISO 8601 or Unix seconds)."""
    try:
        return _parse_time(home.read_config().get("enrolled_at"))
    except (OSError, ValueError, TypeError, LetheError):  # a missing or unreadable config means "unknown"
        return None


def participant_tz(home, policy) -> ZoneInfo:
    """The participant's zone: home config ``timezone``, else the policy's default."""
    try:
        name = home.read_config().get("timezone")
    except (OSError, ValueError):  # unreadable config: the policy's default
        name = None
    return ZoneInfo(name or policy.study.default_timezone)


def load_episodes(vault) -> list[dict]:
    """All stored episodes, sorted by ``utc``."""
    return sorted((obj for _rid, obj in vault.items("episodes")), key=lambda e: (e["utc"], e["key"]))


def build_episodes(home, policy, vault, now: float | None = None) -> list[dict]:
    """Build and upsert episodes from the vault's ``coded`` and ``mood_reports``.

    Hours that ended more than ``retention.feature_days`` ago are *settled*: no
    late data can arrive for them (their features are gone), so an existing
    episode for a settled hour is left as it is, and the coded rows and mood
    reports that only concern settled hours are deleted once their episodes
    exist.  Returns all stored episodes, sorted by ``utc``.
    """
    from .home import Home

    home = home if isinstance(home, Home) else Home(home)
    now = _time.time() if now is None else float(now)
    coded = [obj for _rid, obj in vault.items("coded")]
    coded_rids = [rid for rid, _obj in vault.items("coded")]
    moods = [obj for _rid, obj in vault.items("mood_reports")]
    mood_rids = [rid for rid, _obj in vault.items("mood_reports")]
    start = study_start(home)
    eps = episodes_from_policy(coded, moods, policy, participant_tz(home, policy), study_start_utc=start, now=now)
    settled_before = now - float(policy.retention.feature_days) * 86400.0
    window_s = float(policy.episodes.mood_window_minutes) * 60.0
    with vault.transaction():
        for e in eps:
            hour_end = e["utc"] + 7200  # upper bound of a local hour's length
            if hour_end <= settled_before and vault.get("episodes", e["key"]) is not None:
                continue
            vault.upsert("episodes", e["key"], e)
        # every hour with data up to `now` has an episode now, so rows that only
        # touch settled hours have served their purpose
        # (a local hour lasts at most 2 h, so a row ending 2 h before the
        # settled line only touches settled hours)
        cutoff = settled_before
        for rid, r in zip(coded_rids, coded, strict=False):
            if float(r["t_end"]) + 7200 <= cutoff:
                vault.delete("coded", rid)
        for rid, m in zip(mood_rids, moods, strict=False):
            if float(m["t"]) + window_s + 3600 <= cutoff:
                vault.delete("mood_reports", rid)
    return load_episodes(vault)
