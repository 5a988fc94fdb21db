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
from typing import Any, NoReturn
from collections.abc import Mapping
from zoneinfo import ZoneInfo

import numpy as np

from .. import contracts
from ..errors import DataError

SCHEMA_VERSION = 1
WEEKDAYS = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")  # Monday = 0 as in datetime
SOUND_TYPES = ("quiet_room", "office", "cafe", "supermarket", "sports_music",
               "wind_gulls", "vehicle", "street")

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
    def load(cls, path=None) -> Scenario:
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
    def from_dict(cls, raw: dict, source: str = "<memory>") -> Scenario:
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
def clock_minutes(v: str) -> float:
    h, m = v.split(":")
    return int(h) * 60.0 + int(m)


def _fail(source, key, msg) -> NoReturn:
    raise DataError(f"{source}: [{key}] {msg}")


def _contract_error(source, key, message) -> DataError:
    return DataError(f"{source}: [{key}] {message}")


def _validate(raw: dict, source: str) -> Scenario:
    """``agent/contracts/schemas/scenario.json``, then the references between tables."""
    if not isinstance(raw, dict) or not isinstance(raw.get("scenario"), dict):
        _fail(source, "scenario", "missing section [scenario]")
    if raw["scenario"].get("schema") != SCHEMA_VERSION:
        _fail(source, "scenario.schema",
              f"value {raw['scenario'].get('schema')!r}: this version reads schema = {SCHEMA_VERSION}")
    raw = contracts.apply_defaults("scenario", raw)
    contracts.validate("scenario", raw, source, syntax="toml", error=_contract_error)
    sc = raw["scenario"]
    places: dict[str, Place] = {}
    for i, p in enumerate(raw["places"]):
        w = f"places[{i}]"
        if p["id"] in places:
            _fail(source, f"{w}.id", f"value {p['id']!r} is used twice")
        if sum(p["motion"].values()) <= 0:
            _fail(source, f"{w}.motion", "expected at least one positive weight")
        places[p["id"]] = Place(id=p["id"], type=p["type"], name=p["name"], east_m=float(p["east_m"]),
                                north_m=float(p["north_m"]), wander_m=float(p.get("wander_m", 5.0)),
                                sound=p["sound"], motion={k: float(v) for k, v in p["motion"].items()})
    if sum(p.type == "home" for p in places.values()) != 1:
        _fail(source, "places", "expected exactly one place of type 'home'")
    routine = []
    for i, a in enumerate(raw["routine"]):
        if a["place"] not in places:
            _fail(source, f"routine[{i}].place", f"value {a['place']!r} is not a place id; known: {sorted(places)}")
        routine.append(Activity(
            label=a["label"], place=a["place"], days=frozenset(WEEKDAYS.index(d) for d in a["days"]),
            start_min=clock_minutes(a["start"]), start_jitter_min=float(a.get("start_jitter_min", 0.0)),
            duration_min=float(a["duration_min"]), duration_jitter_min=float(a.get("duration_jitter_min", 0.0)),
            probability=float(a["probability"]), group=a.get("group"), mode=a.get("mode")))
    travel = {k: float(v) for k, v in raw["travel"].items()}
    ir = raw["irregularity"]
    irregularity = {
        "sick_day_probability": float(ir["sick_day_probability"]), "late_probability": float(ir["late_probability"]),
        "late_minutes_max": float(ir["late_minutes_max"]), "latest_start_min": clock_minutes(ir["latest_start"]),
        "night_start_min": clock_minutes(ir["night_start"]), "night_end_min": clock_minutes(ir["night_end"]),
    }
    md = raw["mood"]
    mood: dict[str, Any] = {
        "noise_sd": float(md["noise_sd"]), "skip_probability": float(md["skip_probability"]),
        "response_delay_minutes_max": float(md["response_delay_minutes_max"]),
        "prompt_start_min": clock_minutes(md["prompt_start"]), "prompt_end_min": clock_minutes(md["prompt_end"]),
        "json_probability": float(md["json_probability"]), "default": float(md["default"]),
        "baseline": {k: float(v) for k, v in md["baseline"].items()},
        "bias": {k: {e: float(x) for e, x in v.items()} for k, v in md.get("bias", {}).items()},
    }
    if mood["prompt_end_min"] <= mood["prompt_start_min"]:
        _fail(source, "mood.prompt_end", "must be later than mood.prompt_start")
    answers = {k: float(v) for k, v in raw["answers"].items()}
    if answers["temperature"] <= 0:
        _fail(source, "answers.temperature", "must be > 0")
    return Scenario(
        raw=raw, source=source, name=sc["name"], participant=sc["participant"], town=sc["town"],
        timezone=sc["timezone"], origin_lat=float(sc["origin_lat"]), origin_lon=float(sc["origin_lon"]),
        altitude_m=float(sc.get("altitude_m", 10.0)), places=places, routine=routine, travel=travel,
        irregularity=irregularity, mood=mood, answers=answers,
    )
