"""Mood prompts: when the participant is asked how they feel, and what became of each ask.

The policy sets how many prompts a day (``schedule.mood_prompts_per_day``);
the participant sets their waking hours (default 08:00 to 22:00 local time).
Each day's prompts fall at random instants inside the waking window of that
local date, computed through :mod:`zoneinfo`, so a day on which the clocks
change has a window that is an hour shorter or longer in real time, and no
prompt falls on a wall-clock time that does not exist.

The window ``[start, end)`` (real time) is cut into ``n`` equal slots of length
``L``; prompt ``i`` falls uniformly in ``[start + i L, start + (i + 1) L - L/2)``,
so two prompts are always at least ``L/2`` apart and every prompt is at least
``L/2`` before the end of the window.  The draw is seeded by a random secret
kept in the home and the date, so a restarted agent finds the same schedule and
nobody else can predict it.

A prompt is *open* from its time until it expires: after the policy's
``episodes.mood_window_minutes`` (an answer later than that would no longer
describe the hour it was meant for), or when the next prompt opens, whichever
comes first.  An open prompt that gets no answer is *missed*.  State lives in
``HOME/state/prompts.json``: the waking-hours history, the seed, and which
prompts were answered and notified.  Answers themselves are never kept here:
they go to the inbox as mood reports and take the same path as any other raw
file.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import hmac
import json
import random
import re
import secrets
import time
from dataclasses import dataclass
from zoneinfo import ZoneInfo

from ..errors import DataError, StateError
from ..fsutil import write_private
from ..home import Home

DEFAULT_WAKING = ("08:00", "22:00")
_HHMM = re.compile(r"^([01]\d|2[0-4]):([0-5]\d)$")


@dataclass(frozen=True)
class Prompt:
    """One scheduled ask."""

    prompt_id: str   # "YYYY-MM-DD#i"
    t: float         # Unix seconds
    expires: float   # Unix seconds


def parse_hhmm(text: str, what: str = "time") -> int:
    """``"07:30"`` -> minutes after midnight (``"24:00"`` allowed as the end of the day)."""
    m = _HHMM.match(str(text).strip())
    if not m or (m.group(1) == "24" and m.group(2) != "00"):
        raise DataError(f"{what} {text!r}: expected a 24-hour clock time HH:MM such as 07:30")
    return int(m.group(1)) * 60 + int(m.group(2))


def check_waking(start: str, end: str) -> tuple[str, str]:
    """Validate waking hours; the window must lie within one day and last at least an hour."""
    a, b = parse_hhmm(start, "waking start"), parse_hhmm(end, "waking end")
    if b - a < 60:
        raise DataError(f"waking hours {start}-{end}: the end must be at least an hour after the start "
                        f"(within one day; use 24:00 for midnight)")
    return (f"{a // 60:02d}:{a % 60:02d}", f"{b // 60:02d}:{b % 60:02d}")


def _local_instant(day: _dt.date, minutes: int, zone: ZoneInfo) -> float:
    """Unix seconds of a wall-clock time on ``day``; a time in a spring gap moves forward past it."""
    base = _dt.datetime(day.year, day.month, day.day, tzinfo=zone)
    if minutes >= 24 * 60:
        nxt = day + _dt.timedelta(days=1)
        return _dt.datetime(nxt.year, nxt.month, nxt.day, tzinfo=zone).timestamp()
    wall = base.replace(hour=minutes // 60, minute=minutes % 60)
    t = wall.timestamp()
    # A wall time that does not exist (spring gap) round-trips to another wall time;
    # the first existing instant after the gap is then the transition itself.
    back = _dt.datetime.fromtimestamp(t, zone)
    if (back.hour, back.minute) != (wall.hour, wall.minute):
        t2 = wall.replace(fold=1).timestamp()
        t = min(t, t2)
        while _dt.datetime.fromtimestamp(t, zone).replace(tzinfo=None) < wall.replace(tzinfo=None):
            t += 60
    return t


def day_window(day: _dt.date, waking: tuple[str, str], zone: ZoneInfo) -> tuple[float, float]:
    """The waking window of a local date as real instants ``(start, end)``."""
    start, end = check_waking(*waking)
    return _local_instant(day, parse_hhmm(start), zone), _local_instant(day, parse_hhmm(end), zone)


def schedule_day(day: _dt.date, n: int, waking: tuple[str, str], zone: ZoneInfo, seed: bytes,
                 expiry_s: float) -> list[Prompt]:
    """The ``n`` prompts of one local date (see the module docstring for the rule).

    Parameters
    ----------
    day : datetime.date
        The local date.
    n : int
        Prompts per day (``schedule.mood_prompts_per_day``).
    waking : (str, str)
        Waking hours ``("HH:MM", "HH:MM")`` in local time.
    zone : zoneinfo.ZoneInfo
        The participant's time zone.
    seed : bytes
        The home's secret schedule seed.
    expiry_s : float
        How long a prompt stays open at most, seconds.
    """
    if int(n) < 1:
        raise DataError(f"prompts per day must be at least 1, got {n}")
    if not expiry_s > 0:
        raise DataError(f"prompt expiry must be positive seconds, got {expiry_s}")
    start, end = day_window(day, waking, zone)
    slot = (end - start) / n
    rng = random.Random(hmac.new(seed, day.isoformat().encode(), hashlib.sha256).digest())
    times = [start + i * slot + rng.random() * (slot / 2) for i in range(n)]
    out = []
    for i, t in enumerate(times):
        nxt = times[i + 1] if i + 1 < n else end
        out.append(Prompt(f"{day.isoformat()}#{i}", t, min(t + expiry_s, max(nxt, t + 1.0))))
    return out


def min_spacing_s(day: _dt.date, n: int, waking: tuple[str, str], zone: ZoneInfo) -> float:
    """The guaranteed least distance between two prompts of ``day`` (half a slot), seconds."""
    start, end = day_window(day, waking, zone)
    return (end - start) / n / 2


class PromptBook:
    """The home's prompt schedule and what became of each prompt.

    Parameters
    ----------
    home : Home or path-like
    policy : agent.policy.Policy, optional
        Defaults to the home's policy.
    created : float, optional
        When a new schedule starts (Unix seconds; default now); prompts before it
        are neither counted nor offered.
    """

    def __init__(self, home, policy=None, *, created: float | None = None):
        self.home = home if isinstance(home, Home) else Home(home)
        self._created = created
        self.policy = policy or self.home.load_policy()
        self.path = self.home.state / "prompts.json"

    # -- state ----------------------------------------------------------------------
    def _read(self) -> dict:
        try:
            st = json.loads(self.path.read_text("utf-8"))
        except FileNotFoundError:
            st = {}
        except (OSError, ValueError) as e:
            raise StateError(f"{self.path}: unreadable prompt state ({e}); delete it to start afresh") from None
        if not st.get("seed"):
            # Prompts count from the moment the schedule first exists (the agent's first start).
            since = time.time() if self._created is None else float(self._created)
            first = _dt.datetime.fromtimestamp(since, self.zone).date().isoformat()
            st = {"version": 1, "seed": secrets.token_hex(32), "since": since,
                  "waking": [{"from": first, "start": DEFAULT_WAKING[0], "end": DEFAULT_WAKING[1]}],
                  "answered": {}, "notified": {}}
            self._write(st)
        return st

    def _write(self, st: dict) -> None:
        write_private(self.path, json.dumps(st, indent=1, sort_keys=True).encode())

    @property
    def zone(self) -> ZoneInfo:
        return self.home.timezone()

    @property
    def expiry_s(self) -> float:
        return float(self.policy.episodes.mood_window_minutes) * 60.0

    @property
    def per_day(self) -> int:
        return int(self.policy.schedule.mood_prompts_per_day)

    def waking(self, day: _dt.date | None = None) -> tuple[str, str]:
        """Waking hours in force on ``day`` (default: today)."""
        st = self._read()
        day = day or _dt.datetime.now(self.zone).date()
        cur = st["waking"][0]
        for w in st["waking"]:
            if w["from"] <= day.isoformat():
                cur = w
        return (cur["start"], cur["end"])

    def set_waking(self, start: str, end: str, now: float | None = None) -> dict:
        """New waking hours, in force from tomorrow (today's prompts stay as announced)."""
        start, end = check_waking(start, end)
        st = self._read()
        now = time.time() if now is None else float(now)
        frm = (_dt.datetime.fromtimestamp(now, self.zone).date() + _dt.timedelta(days=1)).isoformat()
        st["waking"] = [w for w in st["waking"] if w["from"] < frm] + [{"from": frm, "start": start, "end": end}]
        self._write(st)
        return {"from": frm, "start": start, "end": end}

    # -- schedule -------------------------------------------------------------------
    def day(self, day: _dt.date) -> list[Prompt]:
        st = self._read()
        return schedule_day(day, self.per_day, self.waking(day), self.zone, bytes.fromhex(st["seed"]),
                            self.expiry_s)

    def first_day(self) -> _dt.date:
        return _dt.date.fromisoformat(self._read()["waking"][0]["from"])

    def prompts_until(self, now: float) -> list[Prompt]:
        """Every prompt from the first day to the end of ``now``'s local date."""
        today = _dt.datetime.fromtimestamp(now, self.zone).date()
        d, out = self.first_day(), []
        while d <= today:
            out += self.day(d)
            d += _dt.timedelta(days=1)
        return out

    def open_prompt(self, now: float | None = None) -> Prompt | None:
        """The prompt open at ``now`` and not yet answered, if any."""
        now = time.time() if now is None else float(now)
        st = self._read()
        answered, since = st["answered"], float(st.get("since", 0))
        today = _dt.datetime.fromtimestamp(now, self.zone).date()
        for d in (today - _dt.timedelta(days=1), today):
            for p in self.day(d):
                if since <= p.t <= now < p.expires and p.prompt_id not in answered:
                    return p
        return None

    def next_prompt(self, now: float | None = None) -> Prompt | None:
        now = time.time() if now is None else float(now)
        today = _dt.datetime.fromtimestamp(now, self.zone).date()
        for d in (today, today + _dt.timedelta(days=1)):
            for p in self.day(d):
                if p.t > now:
                    return p
        return None

    def mark_answered(self, prompt_id: str, now: float | None = None) -> None:
        st = self._read()
        st["answered"][prompt_id] = time.time() if now is None else float(now)
        self._write(st)

    def mark_notified(self, prompt_id: str, now: float | None = None) -> bool:
        """Record that a prompt was announced; False when it already was."""
        st = self._read()
        if prompt_id in st["notified"]:
            return False
        st["notified"][prompt_id] = time.time() if now is None else float(now)
        self._write(st)
        return True

    def counts(self, now: float | None = None) -> dict:
        """``{"asked", "answered", "missed", "open", "per_day", "waking", "next"}`` up to ``now``."""
        now = time.time() if now is None else float(now)
        st = self._read()
        answered = st["answered"]
        asked = [p for p in self.prompts_until(now) if float(st.get("since", 0)) <= p.t <= now]
        n_ans = sum(1 for p in asked if p.prompt_id in answered)
        n_open = sum(1 for p in asked if p.prompt_id not in answered and now < p.expires)
        nxt = self.next_prompt(now)
        return {"asked": len(asked), "answered": n_ans, "missed": len(asked) - n_ans - n_open,
                "open": n_open, "per_day": self.per_day, "waking": list(self.waking()),
                "expiry_minutes": self.expiry_s / 60.0, "next": nxt.t if nxt else None}

    # -- the last answer written by the page ----------------------------------------
    def note_answer_file(self, name: str, baseline: dict, now: float | None = None) -> None:
        st = self._read()
        st["last_answer"] = {"file": name, "at": time.time() if now is None else float(now), "baseline": baseline}
        self._write(st)

    def last_answer(self) -> dict | None:
        return self._read().get("last_answer")
