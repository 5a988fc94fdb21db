"""Ground truth and raw inbox files for the fictional demo participant.

Two steps, both deterministic given their seed:

1. :func:`simulate_days` turns the scenario's weekly routine into a
   :class:`Timeline`: the ground truth, a gap-free sequence of *visits* (at a
   place) and *travel* legs (walk, cycle or vehicle) over whole local days.
2. :func:`write_day` renders one day of the timeline into raw files in an
   inbox on the policy's schedule, the way a phone recorder would drop them:
   WAV snippets, GPS files (GPX 1.1, NMEA 0183, CSV), accelerometry bursts
   (CSV) and mood self-reports (CSV or JSON).  Every file is written as
   ``name.part`` and then renamed, so a watcher never sees half a file.

File formats follow ``docs/inbox-formats.md``; the scenario, schedule and
noise models are described in ``docs/demo.md``.  :func:`write_truth` stores the
timeline as JSON *outside* the inbox, for tests and simulated answers.
"""

from __future__ import annotations

import json
import math
import time
from dataclasses import dataclass, field
from datetime import date, datetime, timedelta
from datetime import time as dtime
from pathlib import Path
from collections.abc import Iterable

import numpy as np

from ..errors import DataError
from ..fsutil import atomic_write
from ..intake.readers.gps import nmea_checksum
from .scenario import Activity, Scenario, destination, offset_latlon
from .soundscapes import synthesize

__all__ = ["Scenario", "Timeline", "simulate_days", "write_day", "write_days", "write_truth",
           "load_truth", "stamp_utc"]

TRUTH_FORMAT = "lethe-demo-truth"
TRUTH_VERSION = 1

# Seed-stream labels, so each kind of randomness has its own independent stream.
_S_TIMELINE, _S_AUDIO, _S_GPS, _S_ACCEL, _S_MOOD = 11, 21, 22, 23, 24

STANDARD_GRAVITY = 9.80665  # m/s^2 per g (CGPM 1901 conventional value, from memory)
KNOTS_PER_MPS = 3600.0 / 1852.0  # 1 international nautical mile = 1852 m


def _rng(*key) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence([int(k) for k in key]))


def stamp_utc(t: float) -> str:
    """ISO 8601 basic UTC stamp ``YYYYMMDDTHHMMSSZ`` used in inbox file names."""
    return time.strftime("%Y%m%dT%H%M%SZ", time.gmtime(t))


def _iso_z(t: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(t))


def _iso_local(t: float, tz) -> str:
    return datetime.fromtimestamp(round(t), tz).isoformat()


# -- ground truth -------------------------------------------------------------------
@dataclass
class Timeline:
    """Where the fictional participant really was: visits and travel legs.

    Segments tile ``[day_starts[0], day_starts[-1])`` without gaps.  A visit is
    ``{"kind": "visit", "place_id", "place_type", "t_start", "t_end"}``; a travel
    leg is ``{"kind": "travel", "from_id", "to_id", "mode", "t_start", "t_end",
    "bend"}`` (``bend``: sideways offset of the route's midpoint as a fraction
    of the leg, since streets are not straight lines).  Times are Unix seconds.
    """

    scenario: Scenario
    seed: int
    day_starts: list[float]  # UTC of each local midnight, days + 1 entries
    segments: list[dict]
    sick_days: list[int] = field(default_factory=list)

    def __post_init__(self):
        self._starts = np.array([s["t_start"] for s in self.segments], dtype=float)
        self._ends = np.array([s["t_end"] for s in self.segments], dtype=float)

    # -- views -----------------------------------------------------------------
    @property
    def days(self) -> int:
        return len(self.day_starts) - 1

    @property
    def start_utc(self) -> float:
        return self.day_starts[0]

    @property
    def end_utc(self) -> float:
        return self.day_starts[-1]

    @property
    def visits(self) -> list[dict]:
        return [{k: s[k] for k in ("place_id", "place_type", "t_start", "t_end")}
                for s in self.segments if s["kind"] == "visit"]

    @property
    def travels(self) -> list[dict]:
        return [{k: s[k] for k in ("from_id", "to_id", "mode", "t_start", "t_end")}
                for s in self.segments if s["kind"] == "travel"]

    def day_bounds(self, day_index: int) -> tuple[float, float]:
        """UTC start and end of local day ``day_index`` (23 or 25 h across a clock change)."""
        if not 0 <= day_index < self.days:
            raise ValueError(f"day_index must be in [0, {self.days}), got {day_index!r}")
        return self.day_starts[day_index], self.day_starts[day_index + 1]

    def day_of(self, t: float) -> int | None:
        i = int(np.searchsorted(self.day_starts, t, side="right")) - 1
        return i if 0 <= i < self.days else None

    # -- lookups ---------------------------------------------------------------
    def segment_index(self, t) -> np.ndarray:
        """Index of the segment covering each time (-1 outside the timeline)."""
        t = np.asarray(t, dtype=float)
        i = np.searchsorted(self._starts, t, side="right") - 1
        ok = (i >= 0) & (t < self._ends[np.maximum(i, 0)])
        return np.where(ok, i, -1)

    def segment_at(self, t: float) -> dict | None:
        i = int(self.segment_index(t))
        return self.segments[i] if i >= 0 else None

    def place_at(self, t: float) -> str | None:
        """Place id at time ``t``, or None while travelling or outside the timeline."""
        s = self.segment_at(t)
        return s["place_id"] if s is not None and s["kind"] == "visit" else None

    def mode_at(self, t: float) -> str | None:
        """Travel mode at ``t`` (``walk``/``cycle``/``vehicle``), ``"stay"`` at a place."""
        s = self.segment_at(t)
        if s is None:
            return None
        return s["mode"] if s["kind"] == "travel" else "stay"

    def sound_type_at(self, t: float) -> str | None:
        """The soundscape recorded at ``t``: the place's, or the travel mode's."""
        s = self.segment_at(t)
        if s is None:
            return None
        if s["kind"] == "visit":
            return self.scenario.places[s["place_id"]].sound
        return "vehicle" if s["mode"] == "vehicle" else "street"

    def is_sick(self, t: float) -> bool:
        return self.day_of(t) in set(self.sick_days)

    def dominant_place(self, t0: float, t1: float) -> str | None:
        """The place occupying most of ``[t0, t1)``, if visits cover at least a third."""
        lo = max(int(np.searchsorted(self._ends, t0, side="right")), 0)
        share: dict[str, float] = {}
        for s in self.segments[lo:]:
            if s["t_start"] >= t1:
                break
            if s["kind"] == "visit":
                o = min(s["t_end"], t1) - max(s["t_start"], t0)
                if o > 0:
                    share[s["place_id"]] = share.get(s["place_id"], 0.0) + o
        if not share or sum(share.values()) < (t1 - t0) / 3.0:
            return None
        return max(share, key=lambda p: share[p])

    def true_positions_m(self, t, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """True east/north (metres from the origin) at each time; visits wander inside the place."""
        t = np.asarray(t, dtype=float)
        east = np.zeros(t.shape)
        north = np.zeros(t.shape)
        idx = self.segment_index(t)
        sc = self.scenario
        for j, i in enumerate(idx):
            s = self.segments[i if i >= 0 else (0 if t[j] < self.start_utc else -1)]
            if s["kind"] == "visit":
                p = sc.places[s["place_id"]]
                r = p.wander_m * math.sqrt(rng.random())
                a = rng.uniform(0, 2 * math.pi)
                east[j], north[j] = p.east_m + r * math.cos(a), p.north_m + r * math.sin(a)
            else:
                east[j], north[j] = _along(sc, s, (t[j] - s["t_start"]) / max(s["t_end"] - s["t_start"], 1.0))
        return east, north

    # -- serialisation -----------------------------------------------------------
    def to_dict(self) -> dict:
        return {"format": TRUTH_FORMAT, "version": TRUTH_VERSION, "fictional": True,
                "scenario": self.scenario.raw, "seed": self.seed,
                "timezone": self.scenario.timezone,
                "start_utc": self.start_utc, "days": self.days, "day_starts": self.day_starts,
                "sick_days": self.sick_days, "segments": self.segments}

    @classmethod
    def from_dict(cls, d: dict, source: str = "<memory>") -> Timeline:
        if d.get("format") != TRUTH_FORMAT or d.get("version") != TRUTH_VERSION:
            raise DataError(f"{source}: not a {TRUTH_FORMAT} version {TRUTH_VERSION} file")
        sc = Scenario.from_dict(d["scenario"], f"{source}#scenario")
        return cls(sc, int(d["seed"]), [float(x) for x in d["day_starts"]], list(d["segments"]),
                   [int(x) for x in d.get("sick_days", [])])


def _along(sc: Scenario, seg: dict, u: float) -> tuple[float, float]:
    """Position a fraction ``u`` of the way along a travel leg (via its bent midpoint)."""
    a, b = sc.places[seg["from_id"]], sc.places[seg["to_id"]]
    de, dn = b.east_m - a.east_m, b.north_m - a.north_m
    we = a.east_m + de / 2 - dn * seg["bend"]
    wn = a.north_m + dn / 2 + de * seg["bend"]
    l1 = math.hypot(we - a.east_m, wn - a.north_m)
    l2 = math.hypot(b.east_m - we, b.north_m - wn)
    s = min(max(u, 0.0), 1.0) * (l1 + l2)
    if s <= l1 and l1 > 0:
        f = s / l1
        return a.east_m + f * (we - a.east_m), a.north_m + f * (wn - a.north_m)
    f = (s - l1) / l2 if l2 > 0 else 1.0
    return we + f * (b.east_m - we), wn + f * (b.north_m - wn)


def write_truth(timeline: Timeline, path) -> Path:
    """Write the ground truth as JSON (atomically).  Keep it OUTSIDE the inbox."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    data = json.dumps(timeline.to_dict(), sort_keys=True, indent=1).encode("utf-8")
    _atomic_bytes(path, data)
    return path


def load_truth(path) -> Timeline:
    """Read a ground-truth file written by :func:`write_truth`."""
    path = Path(path)
    try:
        d = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise DataError(f"{path}: no such ground-truth file") from None
    except (OSError, ValueError) as e:
        raise DataError(f"{path}: cannot read the ground truth ({e})") from None
    return Timeline.from_dict(d, str(path))


# -- simulation ------------------------------------------------------------------------
def _local_midnights(tz, d0: date, days: int) -> list[float]:
    return [datetime.combine(d0 + timedelta(days=i), dtime(0, 0), tz).timestamp() for i in range(days + 1)]


def local_clock(tz, day: date, minutes: float) -> float:
    """UTC of a local wall-clock time ``minutes`` after midnight on ``day``.

    Wall-clock arithmetic (aware datetime plus timedelta), so 09:00 stays 09:00
    on a day with a clock change; an ambiguous time takes its first occurrence.
    """
    return (datetime.combine(day, dtime(0, 0), tz) + timedelta(minutes=float(minutes))).timestamp()


class _Walker:
    """Builds the gap-free segment list while the simulated day unfolds."""

    def __init__(self, sc: Scenario, rng, t0: float):
        self.sc, self.rng = sc, rng
        self.home = sc.home_id
        self.place, self.since, self.free_at = self.home, t0, t0
        self.left_home_by: str | None = None
        self.segments: list[dict] = []

    def leg(self, a: str, b: str, forced: str | None = None) -> tuple[str, float]:
        tr, d = self.sc.travel, self.sc.distance_m(a, b)
        if forced:
            mode = forced
        elif b == self.home and self.left_home_by in ("walk", "cycle") and d <= tr["cycle_max_m"]:
            mode = self.left_home_by  # the bike (or the feet) come home the way they went
        elif d <= tr["walk_max_m"]:
            mode = "walk"
        elif d <= tr["cycle_max_m"]:
            mode = "vehicle" if self.rng.random() < tr["vehicle_instead_probability"] else "cycle"
        else:
            mode = "vehicle"
        speed = tr[f"{mode}_speed_mps"]
        return mode, d * tr["detour_factor"] / speed + 60.0 * self.rng.uniform(0, tr["extra_minutes_max"])

    def close_visit(self, t: float):
        if t > self.since:
            p = self.sc.places[self.place]
            self.segments.append({"kind": "visit", "place_id": p.id, "place_type": p.type,
                                  "t_start": round(self.since, 3), "t_end": round(t, 3)})
        self.since = t

    def go(self, dest: str, depart: float, mode: str, duration: float):
        self.close_visit(depart)
        arrive = depart + duration
        self.segments.append({"kind": "travel", "from_id": self.place, "to_id": dest, "mode": mode,
                              "t_start": round(depart, 3), "t_end": round(arrive, 3),
                              "bend": round(float(self.rng.uniform(-0.15, 0.15)), 4)})
        if self.place == self.home:
            self.left_home_by = mode
        self.place, self.since, self.free_at = dest, arrive, arrive
        return arrive


def _plan_day(sc: Scenario, rng, day: date) -> list[tuple[float, float, Activity]]:
    """Activities happening today as (start, duration, activity), by start time."""
    ir = sc.irregularity
    weekday = day.weekday()
    chosen: list = []
    groups: dict = {}
    for a in sc.routine:
        if weekday not in a.days:
            continue
        if a.group is None:
            if rng.random() < a.probability:
                chosen.append(a)
        else:
            groups.setdefault(a.group, []).append(a)
    for g in sorted(groups):
        cands = groups[g]
        for k in rng.permutation(len(cands)):
            if rng.random() < cands[k].probability:
                chosen.append(cands[k])
                break
    plan = []
    for a in chosen:
        start = a.start_min + rng.normal(0, a.start_jitter_min) if a.start_jitter_min else a.start_min
        if rng.random() < ir["late_probability"]:
            start += rng.uniform(10, max(ir["late_minutes_max"], 10))
        dur = max(a.duration_min + (rng.normal(0, a.duration_jitter_min) if a.duration_jitter_min else 0), 25.0)
        plan.append((local_clock(sc.tz, day, start), 60.0 * dur, a))
    plan.sort(key=lambda x: x[0])
    return plan


HOME_BETWEEN_MIN_S = 20 * 60.0  # a gap this much longer than the round trip is spent at home


def simulate_days(scenario: Scenario, start_utc: float, days: int, seed: int) -> Timeline:
    """Simulate ``days`` whole local days of the routine.

    Parameters
    ----------
    scenario : Scenario
    start_utc : float
        Any Unix time on the first day; the timeline starts at that day's local
        midnight in the scenario's time zone.
    days : int
        Number of local calendar days (>= 1).
    seed : int
        Seed of the simulation (same seed, same timeline).

    Returns
    -------
    Timeline
    """
    if not isinstance(days, (int, np.integer)) or days < 1:
        raise ValueError(f"days must be a positive integer, got {days!r}")
    if not math.isfinite(float(start_utc)):
        raise ValueError(f"start_utc must be a finite Unix time, got {start_utc!r}")
    tz = scenario.tz
    d0 = datetime.fromtimestamp(float(start_utc), tz).date()
    mids = _local_midnights(tz, d0, int(days))
    rng = _rng(seed, _S_TIMELINE)
    ir = scenario.irregularity
    w = _Walker(scenario, rng, mids[0])
    sick_days = []
    for i in range(int(days)):
        day = d0 + timedelta(days=i)
        sick = rng.random() < ir["sick_day_probability"]
        plan = _plan_day(scenario, rng, day)
        if sick:
            sick_days.append(i)
            plan = []
        latest = local_clock(tz, day, ir["latest_start_min"])
        for start, dur, act in plan:
            if act.place == w.place:
                w.free_at = max(w.free_at, start + dur)
                continue
            mode, tt = w.leg(w.place, act.place, act.mode)
            depart = max(start - tt, w.free_at)
            if depart + tt > latest:
                continue  # pushed too late into the evening: dropped
            if w.place != w.home and act.place != w.home:
                m1, t1 = w.leg(w.place, w.home)
                m2, t2 = w.leg(w.home, act.place, act.mode)
                if depart - w.free_at > t1 + t2 + HOME_BETWEEN_MIN_S:  # a long gap: home in between
                    w.go(w.home, w.free_at, m1, t1)
                    mode, tt = m2, t2
                    depart = max(start - tt, w.free_at)
            w.go(act.place, depart, mode, tt)
            w.free_at = depart + tt + dur
        if w.place != w.home:
            mode, tt = w.leg(w.place, w.home)
            w.go(w.home, w.free_at, mode, tt)
    w.close_visit(mids[-1])
    # A return leg started late on the last day could run past the end: clip it.
    segs = [s for s in w.segments if s["t_start"] < mids[-1]]
    if segs and segs[-1]["t_end"] > mids[-1]:
        segs[-1]["t_end"] = mids[-1]
    return Timeline(scenario, int(seed), mids, segs, sick_days)


# -- writing files -------------------------------------------------------------------------
def _atomic_bytes(path: Path, data: bytes) -> None:
    # A hidden temporary name (ignored by intake until renamed); demo data need not be durable.
    atomic_write(path, data, mode=0o644, durable=False, make_parents=False)


def _atomic_audio(path: Path, x: np.ndarray, sr: int) -> None:
    import io

    import soundfile as sf

    # Encode in memory, then one write: far fewer system calls than letting
    # libsndfile seek and patch the header on disk.
    buf = io.BytesIO()
    sf.write(buf, x, sr, format="WAV", subtype="PCM_16")
    _atomic_bytes(path, buf.getvalue())


def write_days(timeline: Timeline, inbox, policy, seed: int, days: Iterable[int] | None = None) -> list[Path]:
    """:func:`write_day` for several days (all of them by default)."""
    out: list[Path] = []
    for i in (range(timeline.days) if days is None else days):
        out += write_day(timeline, i, inbox, policy, seed)
    return out


def write_day(timeline: Timeline, day_index: int, inbox, policy, seed: int) -> list[Path]:
    """Write every raw file of one local day into ``inbox``.

    Parameters
    ----------
    timeline : Timeline
        Ground truth from :func:`simulate_days`.
    day_index : int
        Which day (0-based).
    inbox : path-like
        Directory to write into (created if missing).
    policy : agent.policy.Policy
        Its ``schedule`` section sets the snippet, fix, burst and prompt timing.
    seed : int
        Seed of the sensor noise (same seed, byte-identical files).

    Returns
    -------
    list of pathlib.Path
        The files written, in order of their recording start.
    """
    t0, t1 = timeline.day_bounds(day_index)
    inbox = Path(inbox)
    inbox.mkdir(parents=True, exist_ok=True)
    sch = policy.schedule
    made: list[tuple[float, Path]] = []
    made += _write_audio(timeline, day_index, t0, t1, inbox, sch, seed)
    made += _write_gps(timeline, day_index, t0, t1, inbox, sch, seed)
    made += _write_accel(timeline, day_index, t0, t1, inbox, sch, seed)
    made += _write_mood(timeline, day_index, t0, t1, inbox, sch, seed)
    made.sort(key=lambda x: (x[0], x[1].name))
    return [p for _, p in made]


# -- audio --------------------------------------------------------------------------
AUDIO_MISSING_PROBABILITY = 0.01
AUDIO_HIGH_RATE_PROBABILITY = 0.15  # some recorders use 44.1 kHz ...
AUDIO_STEREO_PROBABILITY = 0.5  # ... and of those, half record stereo


def _write_audio(tl, day, t0, t1, inbox, sch, seed):
    out = []
    step = 60.0 * sch.audio_interval_minutes
    dur = float(sch.audio_snippet_seconds)
    for k, ts in enumerate(np.arange(t0, t1, step)):
        r = _rng(seed, _S_AUDIO, day, k)
        if r.random() < AUDIO_MISSING_PROBABILITY:
            continue
        ts = float(math.floor(ts + r.uniform(0, 4)))
        st = tl.sound_type_at(ts + dur / 2)
        if st is None:
            continue
        hi = r.random() < AUDIO_HIGH_RATE_PROBABILITY
        sr = 44100 if hi else 16000
        ch = 2 if hi and r.random() < AUDIO_STEREO_PROBABILITY else 1
        x = synthesize(st, r, sr=sr, duration_s=dur, channels=ch)
        path = inbox / f"snd_{stamp_utc(ts)}.wav"
        _atomic_audio(path, x, sr)
        out.append((ts, path))
    return out


# -- GPS ----------------------------------------------------------------------------------
GPS_FILE_SECONDS = 3600.0  # the recorder closes a GPS log every hour
GPS_FILE_MISSING_PROBABILITY = 0.03  # a lost hour: a gap in the data
GPS_DROPOUT_PROBABILITY = 0.12  # a run of missing fixes inside a file
GPS_OUTLIER_PROBABILITY = 0.04  # one fix several km off (multipath, a bad cold start)
GPS_CSV_PROBABILITY = 0.15
GPS_UERE_M = 7.0  # user-equivalent range error; accuracy = HDOP x UERE (common practice)
GEOID_SEPARATION_M = 38.6  # invented but plausible for mid-ocean; only carried in GGA


def _gps_noise(r, n, indoor):
    """HDOP, accuracy (m) and horizontal error distance (m) for n fixes."""
    hdop = np.clip(r.lognormal(np.where(indoor, np.log(1.8), np.log(1.1)), 0.3, n), 0.6, 9.5)
    acc = hdop * GPS_UERE_M
    dist = np.minimum(3.0 + r.rayleigh(0.9 * acc), 45.0)  # a floor: multipath never vanishes
    return hdop, acc, dist


def _write_gps(tl, day, t0, t1, inbox, sch, seed):
    sc = tl.scenario
    out = []
    grid = np.arange(t0, t1, 60.0 * sch.gps_interval_minutes)  # the day's fix schedule
    for h, hs in enumerate(np.arange(t0, t1, GPS_FILE_SECONDS)):
        r = _rng(seed, _S_GPS, day, h)
        if r.random() < GPS_FILE_MISSING_PROBABILITY:
            continue
        base = grid[(grid >= hs) & (grid < hs + GPS_FILE_SECONDS)]
        if base.size == 0:
            continue  # a sparse schedule: no fix falls in this hour
        ts = np.floor(base + r.uniform(0, 3, base.size))
        keep = np.ones(ts.size, bool)
        if r.random() < GPS_DROPOUT_PROBABILITY and ts.size > 2:
            a = int(r.integers(0, ts.size - 1))
            keep[a:a + int(r.integers(1, 4))] = False
        if not keep.any():
            continue
        east, north = tl.true_positions_m(ts, r)
        lat0, lon0 = offset_latlon(sc.origin_lat, sc.origin_lon, east, north)
        seg_idx = tl.segment_index(ts)
        indoor = np.array([i >= 0 and tl.segments[i]["kind"] == "visit"
                           and sc.places[tl.segments[i]["place_id"]].type not in ("park", "harbour", "trip")
                           for i in seg_idx])
        hdop, acc, dist = _gps_noise(r, ts.size, indoor)
        bearing = r.uniform(0, 360, ts.size)
        if r.random() < GPS_OUTLIER_PROBABILITY:
            j = int(r.integers(0, ts.size))
            dist[j] = r.uniform(2000, 5000)
            if r.random() < 0.5:  # half the time the receiver knows its geometry was bad
                hdop[j] = r.uniform(12.0, 25.0)
                acc[j] = hdop[j] * GPS_UERE_M
        lat, lon = destination(lat0, lon0, bearing, dist)
        # speed and course over ground from the true track (1 s ahead)
        e2, n2 = tl.true_positions_m(ts + 1.0, _rng(seed, _S_GPS, day, h, 1))
        moving = np.array([i >= 0 and tl.segments[i]["kind"] == "travel" for i in seg_idx])
        sog = np.where(moving, np.hypot(e2 - east, n2 - north), r.uniform(0, 0.2, ts.size))
        cog = np.degrees(np.arctan2(e2 - east, n2 - north)) % 360.0
        alt = sc.altitude_m + r.normal(0, 3.0, ts.size) * hdop
        fixes = dict(t=ts, lat=lat, lon=lon, hdop=hdop, acc=acc, sog=sog, cog=cog, alt=alt, keep=keep)
        first = float(ts[keep][0])
        roll = r.random()
        if roll < GPS_CSV_PROBABILITY:
            path = inbox / f"gps_{stamp_utc(first)}.gps.csv"
            data = _gps_csv(fixes, r, sc.tz)
        elif h % 2 == 0:
            path = inbox / f"gps_{stamp_utc(first)}.gpx"
            data = _gpx(fixes)
        else:
            path = inbox / f"gps_{stamp_utc(first)}.nmea"
            data = _nmea(fixes, r)
        _atomic_bytes(path, data)
        out.append((first, path))
    return out


def _gpx(f) -> bytes:
    lines = ['<?xml version="1.0" encoding="UTF-8"?>',
             '<gpx version="1.1" creator="harbour-days demo recorder" '
             'xmlns="http://www.topografix.com/GPX/1/1" '
             'xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance" '
             'xsi:schemaLocation="http://www.topografix.com/GPX/1/1 http://www.topografix.com/GPX/1/1/gpx.xsd">',
             f'  <metadata><time>{_iso_z(f["t"][f["keep"]][0])}</time></metadata>',
             "  <trk>", "    <name>demo track</name>", "    <trkseg>"]
    for i in np.flatnonzero(f["keep"]):
        # child order follows the GPX 1.1 wptType sequence: ele, time, ..., hdop
        lines.append(f'      <trkpt lat="{f["lat"][i]:.7f}" lon="{f["lon"][i]:.7f}">'
                     f'<ele>{f["alt"][i]:.1f}</ele><time>{_iso_z(f["t"][i])}</time>'
                     f'<hdop>{f["hdop"][i]:.1f}</hdop></trkpt>')
    lines += ["    </trkseg>", "  </trk>", "</gpx>", ""]
    return "\n".join(lines).encode("utf-8")


def _sentence(body: str) -> str:
    return f"${body}*{nmea_checksum(body):02X}\r\n"


def _nmea_coord(value: float, deg_digits: int, pos: str, neg: str) -> str:
    total_min = round(abs(value) * 60.0, 4)
    deg = int(total_min // 60)
    minutes = total_min - deg * 60
    return f"{deg:0{deg_digits}d}{minutes:07.4f},{pos if value >= 0 else neg}"


def _nmea(f, r) -> bytes:
    talker = "GN" if r.random() < 0.4 else "GP"
    out = []
    for i in range(f["t"].size):
        tm = time.gmtime(f["t"][i])
        hms = time.strftime("%H%M%S", tm) + ".00"
        dmy = time.strftime("%d%m%y", tm)
        if not f["keep"][i]:
            if r.random() < 0.5:  # the receiver lost its fix and says so
                out.append(_sentence(f"{talker}RMC,{hms},V,,,,,,,{dmy},,,N"))
                out.append(_sentence(f"{talker}GGA,{hms},,,,,0,00,99.9,,M,,M,,"))
            continue
        lat = _nmea_coord(f["lat"][i], 2, "N", "S")
        lon = _nmea_coord(f["lon"][i], 3, "E", "W")
        knots = f["sog"][i] * KNOTS_PER_MPS
        sats = int(np.clip(round(14 - 3 * f["hdop"][i] + r.normal(0, 1)), 4, 14))
        out.append(_sentence(f"{talker}RMC,{hms},A,{lat},{lon},{knots:.2f},{f['cog'][i]:.1f},{dmy},,,A"))
        out.append(_sentence(f"{talker}GGA,{hms},{lat},{lon},1,{sats:02d},{f['hdop'][i]:.1f},"
                             f"{f['alt'][i]:.1f},M,{GEOID_SEPARATION_M:.1f},M,,"))
    return "".join(out).encode("ascii")


def _gps_csv(f, r, tz) -> bytes:
    with_acc = r.random() < 0.7
    local = r.random() < 0.5
    rows = ["time,lat,lon,accuracy_m" if with_acc else "time,lat,lon"]
    for i in np.flatnonzero(f["keep"]):
        tt = _iso_local(f["t"][i], tz) if local else _iso_z(f["t"][i])
        row = f"{tt},{f['lat'][i]:.7f},{f['lon'][i]:.7f}"
        rows.append(row + (f",{f['acc'][i]:.1f}" if with_acc else ""))
    return ("\n".join(rows) + "\n").encode("utf-8")


# -- accelerometry ----------------------------------------------------------------------
ACCEL_MISSING_PROBABILITY = 0.01
ACCEL_MS2_PROBABILITY = 0.15  # some recorders report m/s^2 instead of g
ACCEL_OFFSET_S = 120.0  # bursts start 2 minutes after the audio grid
ACCEL_NOISE_G = 0.005  # sensor noise of a phone MEMS accelerometer (common practice)


def _posture(r, mode):
    """Unit gravity direction and a horizontal direction, in device axes."""
    if mode in ("still", "vehicle") and r.random() < 0.7:
        g = np.array([0.0, 0.0, 1.0])  # lying flat on a table or a seat
        tilt = r.normal(0, 0.08, 3)
    else:
        g = np.array([0.0, 1.0, 0.0])  # upright in a pocket or a bag
        tilt = r.normal(0, 0.25, 3)
    g = g + tilt
    g /= np.linalg.norm(g)
    h = np.cross(g, [1.0, 0.0, 0.0]) if abs(g[0]) < 0.9 else np.cross(g, [0.0, 1.0, 0.0])
    return g, h / np.linalg.norm(h)


def accel_signal(modes: np.ndarray, t: np.ndarray, r: np.random.Generator, rate_hz: float) -> np.ndarray:
    """Acceleration in g, shape (n, 3), for per-sample movement states.

    States: ``still`` (gravity plus sensor noise), ``walk`` (about 2 steps/s,
    vertical fundamental with a harmonic), ``run`` (about 2.7 steps/s, larger),
    ``cycle`` (pedalling at about 1.3 Hz plus road vibration), ``vehicle``
    (broadband low-amplitude vibration, the 5-15 Hz engine and road band
    aliased by an unfiltered 10 Hz sensor, plus slow speed changes).
    """
    n = t.size
    tt = t - t[0]
    first = str(modes[0])
    g, h = _posture(r, first)
    vert = np.zeros(n)
    fwd = np.zeros(n)
    extra = np.zeros((n, 3))
    for m in np.unique(modes):
        sel = modes == m
        if m == "still":
            continue
        if m in ("walk", "run"):
            f = r.uniform(1.75, 2.2) if m == "walk" else r.uniform(2.5, 2.9)
            a1 = r.uniform(0.2, 0.35) if m == "walk" else r.uniform(0.6, 0.9)
            ph = r.uniform(0, 2 * np.pi, 2)
            v = a1 * np.sin(2 * np.pi * f * tt + ph[0]) + 0.3 * a1 * np.sin(4 * np.pi * f * tt + ph[1])
            fw = 0.3 * a1 * np.sin(np.pi * f * tt + ph[1])
            e = 0.03 * r.standard_normal((n, 3))
        elif m == "cycle":
            f = r.uniform(1.1, 1.5)
            ph = r.uniform(0, 2 * np.pi, 1)[0]
            # a phone in a trouser pocket follows the thigh: one swing per pedal turn
            v = 0.14 * np.sin(2 * np.pi * f * tt + ph) + 0.04 * np.sin(4 * np.pi * f * tt)
            fw = 0.12 * np.sin(2 * np.pi * f * tt + ph + 1.0)
            e = 0.04 * r.standard_normal((n, 3))
        else:  # vehicle
            v = 0.0 * tt
            fw = 0.05 * np.sin(2 * np.pi * r.uniform(0.02, 0.06) * tt + r.uniform(0, 6))
            e = r.uniform(0.015, 0.035) * r.standard_normal((n, 3))
        vert[sel], fwd[sel], extra[sel] = v[sel], fw[sel], e[sel]
    acc = (1.0 + vert)[:, None] * g[None, :] + fwd[:, None] * h[None, :] + extra
    return acc + ACCEL_NOISE_G * r.standard_normal((n, 3))


def _burst_modes(tl: Timeline, t: np.ndarray, r) -> np.ndarray:
    """Movement state per sample: the travel mode, or a state drawn once per visit."""
    sc, ir = tl.scenario, tl.scenario.irregularity
    idx = tl.segment_index(t)
    modes = np.full(t.size, "still", dtype="<U7")
    for i in np.unique(idx):
        if i < 0:
            continue
        sel = idx == i
        s = tl.segments[i]
        if s["kind"] == "travel":
            modes[sel] = s["mode"]
            continue
        t_first = float(t[sel][0])
        local = datetime.fromtimestamp(t_first, sc.tz)
        minute = local.hour * 60 + local.minute
        night = (minute >= ir["night_start_min"] or minute < ir["night_end_min"]) and s["place_id"] == sc.home_id
        if night or tl.is_sick(t_first):
            continue
        mo = sc.places[s["place_id"]].motion
        keys = sorted(mo)
        p = np.array([mo[k] for k in keys])
        modes[sel] = keys[int(r.choice(len(keys), p=p / p.sum()))]
    return modes


def _write_accel(tl, day, t0, t1, inbox, sch, seed):
    out = []
    step = 60.0 * sch.accel_interval_minutes
    rate = float(sch.accel_rate_hz)
    n = int(round(sch.accel_burst_seconds * rate))
    for k, ts in enumerate(np.arange(t0 + min(ACCEL_OFFSET_S, step / 2), t1, step)):
        r = _rng(seed, _S_ACCEL, day, k)
        if r.random() < ACCEL_MISSING_PROBABILITY:
            continue
        ts = float(math.floor(ts + r.uniform(0, 3)))
        t = ts + np.arange(n) / rate
        modes = _burst_modes(tl, t, r)
        a = accel_signal(modes, t, r, rate)
        ms2 = r.random() < ACCEL_MS2_PROBABILITY
        if ms2:
            a = a * STANDARD_GRAVITY
        head = f"# unit={'m/s^2' if ms2 else 'g'} rate_hz={rate:g}\ntime,x,y,z\n"
        body = ("%.3f,%.4f,%.4f,%.4f\n" * n) % tuple(np.column_stack([t, a]).ravel())
        path = inbox / f"acc_{stamp_utc(ts)}.accel.csv"
        _atomic_bytes(path, (head + body).encode("ascii"))
        out.append((ts, path))
    return out


# -- mood ---------------------------------------------------------------------------------
def mood_ratings(tl: Timeline, t: float, emotions, lo: int, hi: int, r) -> dict[str, int]:
    """Ratings biased by where the participant is (or how they travel, or a sick day)."""
    md = tl.scenario.mood
    seg = tl.segment_at(t)
    keys = []
    if seg is not None:
        keys.append(seg["place_type"] if seg["kind"] == "visit" else "travel")
    if tl.is_sick(t):
        keys.append("sick")
    out = {}
    for e in emotions:
        v = md["baseline"].get(e, md["default"])
        for k in keys:
            v += md["bias"].get(k, {}).get(e, 0.0)
        v += r.normal(0, md["noise_sd"])
        out[e] = int(np.clip(round(v), lo, hi))
    return out


def _write_mood(tl, day, t0, t1, inbox, sch, seed):
    sc, md = tl.scenario, tl.scenario.mood
    r = _rng(seed, _S_MOOD, day)
    n = int(sch.mood_prompts_per_day)
    today = datetime.fromtimestamp(t0, sc.tz).date()
    a, b = (local_clock(sc.tz, today, md["prompt_start_min"]), local_clock(sc.tz, today, md["prompt_end_min"]))
    edges = np.linspace(a, b, n + 1)
    slot = (b - a) / n
    prompts = edges[:-1] + r.uniform(0.1, 0.9, n) * slot  # one random time in each slot
    emotions = list(sch.emotions)
    out = []
    for pt in prompts:
        if r.random() < md["skip_probability"]:
            continue
        rt = float(math.floor(pt + 60.0 * r.uniform(0.3, max(md["response_delay_minutes_max"], 0.3))))
        if rt >= t1:
            continue
        ratings = mood_ratings(tl, rt, emotions, sch.mood_scale_min, sch.mood_scale_max, r)
        tt = _iso_local(rt, sc.tz) if r.random() < 0.7 else _iso_z(rt)
        if r.random() < md["json_probability"]:  # the app's other export format
            path = inbox / f"mood_{stamp_utc(rt)}.mood.json"
            data = json.dumps({"reports": [{"time": tt, "ratings": ratings}]}, indent=1).encode("utf-8")
        else:
            path = inbox / f"mood_{stamp_utc(rt)}.mood.csv"
            data = ("time," + ",".join(emotions) + "\n" + tt + ","
                    + ",".join(str(ratings[e]) for e in emotions) + "\n").encode("utf-8")
        _atomic_bytes(path, data)
        out.append((rt, path))
    return out
