"""The fictional demo scenario: who, where, and the weekly routine.

A scenario is a TOML file (``demo_data/scenario.toml``) describing one invented
participant in an invented town placed on open ocean.  Loading is strict like
the policy loader: a missing key, a wrong type or an unknown reference raises
:class:`~agent.errors.DataError` naming the file, the key and what was expected.

This module also holds the small local geodesy the generator needs: a
metres-east/north frame around a point on the WGS84 ellipsoid.  It uses the
ellipsoid's meridional and prime-vertical radii of curvature at the point, which
is accurate to far better than 0.1% over the few kilometres a town spans
(checked against geographiclib in the tests).
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np

from ..errors import DataError

SCHEMA_VERSION = 1
WEEKDAYS = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")  # Monday = 0 as in datetime
PLACE_TYPES = ("home", "workplace", "grocery", "bakery", "cafe", "sports_hall",
               "friend_home", "harbour", "park", "trip")
SOUND_TYPES = ("quiet_room", "office", "cafe", "supermarket", "sports_music",
               "wind_gulls", "vehicle", "street")
VISIT_MOTIONS = ("still", "walk", "run")
TRAVEL_MODES = ("walk", "cycle", "vehicle")

# WGS84 defining constants (NIMA TR8350.2), from memory: a and 1/f.
WGS84_A = 6378137.0
WGS84_F = 1.0 / 298.257223563
_E2 = WGS84_F * (2.0 - WGS84_F)


# -- local geodesy ------------------------------------------------------------
def radii_of_curvature(lat_deg):
    """Meridional (M) and prime-vertical (N) radii of curvature in metres."""
    s = np.sin(np.radians(lat_deg))
    w = np.sqrt(1.0 - _E2 * s * s)
    return WGS84_A * (1.0 - _E2) / w**3, WGS84_A / w


def offset_latlon(lat_deg, lon_deg, east_m, north_m):
    """Move a point by metres east and north on the WGS84 ellipsoid.

    The radii are taken at the mid-latitude of the move, which keeps the error
    well below 0.1% for moves of a few tens of kilometres.  Works elementwise
    on numpy arrays.
    """
    lat_deg = np.asarray(lat_deg, dtype=float)
    north_m = np.asarray(north_m, dtype=float)
    m0, _ = radii_of_curvature(lat_deg)
    mid = lat_deg + np.degrees(north_m / m0) / 2.0
    m, n = radii_of_curvature(mid)
    lat = lat_deg + np.degrees(north_m / m)
    lon = np.asarray(lon_deg, dtype=float) + np.degrees(np.asarray(east_m, float) / (n * np.cos(np.radians(mid))))
    return lat, lon


def destination(lat_deg, lon_deg, azimuth_deg, distance_m):
    """Point reached from (lat, lon) going ``distance_m`` along ``azimuth_deg``.

    Azimuth is clockwise from north, as in geodesy.  Elementwise on arrays.
    """
    az = np.radians(np.asarray(azimuth_deg, dtype=float))
    d = np.asarray(distance_m, dtype=float)
    return offset_latlon(lat_deg, lon_deg, d * np.sin(az), d * np.cos(az))


# -- schema ---------------------------------------------------------------------
@dataclass(frozen=True)
class Place:
    """One place of the scenario, in metres from the town origin."""

    id: str
    type: str
    name: str
    east_m: float
    north_m: float
    wander_m: float
    sound: str
    motion: Mapping[str, float]


@dataclass(frozen=True)
class Activity:
    """One routine entry: a place visited on some weekdays with some probability."""

    label: str
    place: str
    days: frozenset
    start_min: float
    start_jitter_min: float
    duration_min: float
    duration_jitter_min: float
    probability: float
    group: str | None = None
    mode: str | None = None


@dataclass
class Scenario:
    """A validated scenario.  Build with :meth:`load` or :meth:`from_dict`."""

    raw: dict
    source: str
    name: str
    participant: str
    town: str
    timezone: str
    origin_lat: float
    origin_lon: float
    altitude_m: float
    places: dict[str, Place]
    routine: list[Activity]
    travel: dict[str, float]
    irregularity: dict[str, Any]
    mood: dict[str, Any]
    answers: dict[str, float]
    _latlon: dict = field(default_factory=dict, repr=False)

    @classmethod
    def load(cls, path=None) -> "Scenario":
        """Read and validate a scenario file (default: the bundled demo scenario)."""
        path = Path(path) if path is not None else default_scenario_path()
        try:
            text = path.read_text(encoding="utf-8")
        except FileNotFoundError:
            raise DataError(f"{path}: no such scenario file") from None
        except (OSError, UnicodeDecodeError) as e:
            raise DataError(f"{path}: cannot read the scenario file ({e})") from None
        try:
            raw = tomllib.loads(text)
        except tomllib.TOMLDecodeError as e:
            raise DataError(f"{path}: not valid TOML: {e}") from None
        return cls.from_dict(raw, str(path))

    @classmethod
    def from_dict(cls, raw: dict, source: str = "<memory>") -> "Scenario":
        return _validate(raw, source)

    @property
    def tz(self) -> ZoneInfo:
        return ZoneInfo(self.timezone)

    def latlon(self, place_id: str) -> tuple[float, float]:
        """Latitude and longitude (degrees) of a place's centre."""
        if place_id not in self._latlon:
            p = self.places[place_id]
            lat, lon = offset_latlon(self.origin_lat, self.origin_lon, p.east_m, p.north_m)
            self._latlon[place_id] = (float(lat), float(lon))
        return self._latlon[place_id]

    def distance_m(self, a: str, b: str) -> float:
        pa, pb = self.places[a], self.places[b]
        return math.hypot(pa.east_m - pb.east_m, pa.north_m - pb.north_m)

    @property
    def home_id(self) -> str:
        return next(p.id for p in self.places.values() if p.type == "home")


def default_scenario_path() -> Path:
    """``demo_data/scenario.toml`` next to the package (repo checkout) or inside it."""
    here = Path(__file__).resolve().parent
    for cand in (here.parent.parent / "demo_data" / "scenario.toml", here / "data" / "scenario.toml"):
        if cand.exists():
            return cand
    raise DataError("demo_data/scenario.toml: bundled scenario not found next to the package")


# -- validation -------------------------------------------------------------------
class _Checker:
    def __init__(self, source):
        self.source = source

    def fail(self, key, msg):
        raise DataError(f"{self.source}: [{key}] {msg}")

    def get(self, table, key, kind, where, default=..., check=None):
        if key not in table:
            if default is ...:
                self.fail(f"{where}.{key}", f"required key is missing (expected {_kind_name(kind)})")
            return default
        v = table[key]
        ok = isinstance(v, kind) and not (isinstance(v, bool) and kind is not bool)
        if not ok:
            self.fail(f"{where}.{key}", f"value {v!r} has the wrong type: expected {_kind_name(kind)}")
        if check is not None:
            problem = check(v)
            if problem:
                self.fail(f"{where}.{key}", f"value {v!r} is out of range: expected {problem}")
        return float(v) if kind == (int, float) else v


def _kind_name(kind):
    return {str: "a string", bool: "true or false", list: "a list", dict: "a table",
            (int, float): "a number"}.get(kind, getattr(kind, "__name__", str(kind)))


def _between(lo, hi):
    return lambda v: None if lo <= v <= hi else f"between {lo} and {hi}"


def _member(choices):
    return lambda v: None if v in choices else f"one of {list(choices)}"


def _clock(v):
    try:
        h, m = v.split(":")
        h, m = int(h), int(m)
    except ValueError:
        return "a local time 'HH:MM'"
    return None if 0 <= h < 24 and 0 <= m < 60 else "a local time 'HH:MM'"


def clock_minutes(v: str) -> float:
    h, m = v.split(":")
    return int(h) * 60.0 + int(m)


NUM = (int, float)


def _validate(raw: dict, source: str) -> Scenario:
    c = _Checker(source)
    sc = c.get(raw, "scenario", dict, "<document>")
    if sc.get("schema") != SCHEMA_VERSION:
        c.fail("scenario.schema", f"value {sc.get('schema')!r}: this version reads schema = {SCHEMA_VERSION}")
    if sc.get("fictional") is not True:
        c.fail("scenario.fictional", "must be true: demo scenarios describe invented people and places only")
    tzname = c.get(sc, "timezone", str, "scenario")
    try:
        ZoneInfo(tzname)
    except (ZoneInfoNotFoundError, ValueError):
        c.fail("scenario.timezone", f"value {tzname!r}: expected an IANA time zone name")

    places: dict[str, Place] = {}
    plist = c.get(raw, "places", list, "<document>")
    for i, p in enumerate(plist):
        w = f"places[{i}]"
        if not isinstance(p, dict):
            c.fail(w, "expected a table [[places]]")
        pid = c.get(p, "id", str, w)
        if pid in places:
            c.fail(f"{w}.id", f"value {pid!r} is used twice")
        motion = c.get(p, "motion", dict, w)
        for k, v in motion.items():
            if k not in VISIT_MOTIONS or not isinstance(v, NUM) or isinstance(v, bool) or v < 0:
                c.fail(f"{w}.motion.{k}", f"expected keys from {list(VISIT_MOTIONS)} with weights >= 0")
        if not motion or sum(motion.values()) <= 0:
            c.fail(f"{w}.motion", "expected at least one positive weight")
        places[pid] = Place(
            id=pid,
            type=c.get(p, "type", str, w, check=_member(PLACE_TYPES)),
            name=c.get(p, "name", str, w),
            east_m=c.get(p, "east_m", NUM, w, check=_between(-50000, 50000)),
            north_m=c.get(p, "north_m", NUM, w, check=_between(-50000, 50000)),
            wander_m=c.get(p, "wander_m", NUM, w, 5.0, _between(0, 500)),
            sound=c.get(p, "sound", str, w, check=_member(SOUND_TYPES)),
            motion={k: float(v) for k, v in motion.items()},
        )
    if sum(p.type == "home" for p in places.values()) != 1:
        c.fail("places", "expected exactly one place of type 'home'")

    routine = []
    for i, a in enumerate(c.get(raw, "routine", list, "<document>")):
        w = f"routine[{i}]"
        pid = c.get(a, "place", str, w)
        if pid not in places:
            c.fail(f"{w}.place", f"value {pid!r} is not a place id; known: {sorted(places)}")
        days = c.get(a, "days", list, w)
        if not days or any(d not in WEEKDAYS for d in days):
            c.fail(f"{w}.days", f"value {days!r}: expected a non-empty list drawn from {list(WEEKDAYS)}")
        mode = c.get(a, "mode", str, w, None, _member(TRAVEL_MODES))
        routine.append(Activity(
            label=c.get(a, "label", str, w),
            place=pid,
            days=frozenset(WEEKDAYS.index(d) for d in days),
            start_min=clock_minutes(c.get(a, "start", str, w, check=_clock)),
            start_jitter_min=c.get(a, "start_jitter_min", NUM, w, 0.0, _between(0, 240)),
            duration_min=c.get(a, "duration_min", NUM, w, check=_between(1, 1440)),
            duration_jitter_min=c.get(a, "duration_jitter_min", NUM, w, 0.0, _between(0, 240)),
            probability=c.get(a, "probability", NUM, w, check=_between(0, 1)),
            group=c.get(a, "group", str, w, None),
            mode=mode,
        ))

    tr = c.get(raw, "travel", dict, "<document>")
    travel = {k: c.get(tr, k, NUM, "travel", check=_between(0, 1e6)) for k in (
        "detour_factor", "walk_speed_mps", "cycle_speed_mps", "vehicle_speed_mps", "walk_max_m",
        "cycle_max_m", "vehicle_instead_probability", "extra_minutes_max")}
    ir = c.get(raw, "irregularity", dict, "<document>")
    irregularity = {
        "sick_day_probability": c.get(ir, "sick_day_probability", NUM, "irregularity", check=_between(0, 1)),
        "late_probability": c.get(ir, "late_probability", NUM, "irregularity", check=_between(0, 1)),
        "late_minutes_max": c.get(ir, "late_minutes_max", NUM, "irregularity", check=_between(0, 600)),
        "latest_start_min": clock_minutes(c.get(ir, "latest_start", str, "irregularity", check=_clock)),
        "night_start_min": clock_minutes(c.get(ir, "night_start", str, "irregularity", check=_clock)),
        "night_end_min": clock_minutes(c.get(ir, "night_end", str, "irregularity", check=_clock)),
    }
    md = c.get(raw, "mood", dict, "<document>")
    mood = {
        "noise_sd": c.get(md, "noise_sd", NUM, "mood", check=_between(0, 10)),
        "skip_probability": c.get(md, "skip_probability", NUM, "mood", check=_between(0, 1)),
        "response_delay_minutes_max": c.get(md, "response_delay_minutes_max", NUM, "mood", check=_between(0, 120)),
        "prompt_start_min": clock_minutes(c.get(md, "prompt_start", str, "mood", check=_clock)),
        "prompt_end_min": clock_minutes(c.get(md, "prompt_end", str, "mood", check=_clock)),
        "json_probability": c.get(md, "json_probability", NUM, "mood", check=_between(0, 1)),
        "default": c.get(md, "default", NUM, "mood"),
        "baseline": {k: float(v) for k, v in c.get(md, "baseline", dict, "mood").items()},
        "bias": {k: {e: float(x) for e, x in v.items()} for k, v in c.get(md, "bias", dict, "mood", {}).items()},
    }
    if mood["prompt_end_min"] <= mood["prompt_start_min"]:
        c.fail("mood.prompt_end", "must be later than mood.prompt_start")
    an = c.get(raw, "answers", dict, "<document>")
    answers = {k: c.get(an, k, NUM, "answers", check=_between(0, 1e3)) for k in (
        "true_bonus", "habit_weight", "temperature", "skip_probability", "rt_median_s", "rt_sigma")}
    if answers["temperature"] <= 0:
        c.fail("answers.temperature", "must be > 0")

    return Scenario(
        raw=raw, source=source,
        name=c.get(sc, "name", str, "scenario"),
        participant=c.get(sc, "participant", str, "scenario"),
        town=c.get(sc, "town", str, "scenario"),
        timezone=tzname,
        origin_lat=c.get(sc, "origin_lat", NUM, "scenario", check=_between(-80, 80)),
        origin_lon=c.get(sc, "origin_lon", NUM, "scenario", check=_between(-180, 180)),
        altitude_m=c.get(sc, "altitude_m", NUM, "scenario", 10.0),
        places=places, routine=routine, travel=travel, irregularity=irregularity,
        mood=mood, answers=answers,
    )
