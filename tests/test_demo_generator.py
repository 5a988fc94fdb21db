"""The fictional demo scenario, its raw-data generator and the simulated answers.

Outside references: geographiclib's WGS84 geodesics (Karney 2013, "Algorithms
for geodesics", J. Geodesy 87:43-55) for distances; the NMEA 0183 checksum rule
(XOR of the characters between '$' and '*') with a widely reproduced example
sentence (from memory); the GPX 1.1 schema's namespace, version attribute and
wptType child order (topografix.com GPX 1.1, from memory); soundfile for WAV
decoding; scipy.signal.welch for spectra; zoneinfo/tzdata for the clock change.
"""

from __future__ import annotations

import functools
import json
import operator
import re
from collections import Counter
from datetime import datetime
from itertools import pairwise
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pytest
from geographiclib import geodesic

from agent.demo import Scenario, load_truth, simulate_days, write_day, write_truth
from agent.demo.answers import simulate_answers, simulate_place_names, true_place_map
from agent.demo.generator import accel_signal, stamp_utc
from agent.demo.scenario import destination
from agent.demo.soundscapes import synthesize
from agent.errors import DataError

WGS84 = geodesic.Geodesic.WGS84

# Saturday 24 October 2026, 12:00 UTC.  The Azores leave summer time on Sunday
# 25 October 2026 (last Sunday of October, EU rule), so day 1 has 25 hours.
START = datetime(2026, 10, 24, 12, 0, tzinfo=ZoneInfo("UTC")).timestamp()
DAYS = 3
SEED = 7
STAMP = re.compile(r"(\d{8}T\d{6}Z)")


@pytest.fixture(scope="module")
def scenario():
    return Scenario.load()


@pytest.fixture(scope="module")
def policy():
    from agent.policy import bundled_policy_path, load_policy

    return load_policy(bundled_policy_path("default"))


@pytest.fixture(scope="module")
def timeline(scenario):
    return simulate_days(scenario, START, DAYS, seed=SEED)


@pytest.fixture(scope="module")
def inbox(tmp_path_factory, timeline, policy):
    box = tmp_path_factory.mktemp("inbox")
    files = []
    for d in range(DAYS):
        files += write_day(timeline, d, box, policy, seed=SEED)
    return box, files


def _kind(p: Path) -> str:
    for suf in (".gps.csv", ".accel.csv", ".mood.csv", ".mood.json", ".gpx", ".nmea", ".wav"):
        if p.name.endswith(suf):
            return suf
    return p.suffix


# -- geodesy --------------------------------------------------------------------
def test_gps_offsets_match_geodesic_distances(scenario):
    # Karney 2013 via geographiclib: the generator's metre offsets must be the
    # distances they claim, within 0.5%, from GPS-noise size to outlier size.
    rng = np.random.default_rng(0)
    dist = np.concatenate([rng.uniform(1, 50, 200), rng.uniform(2000, 5000, 50), [12000.0]])
    az = rng.uniform(0, 360, dist.size)
    lat0 = scenario.origin_lat + rng.uniform(-0.1, 0.1, dist.size)
    lon0 = scenario.origin_lon + rng.uniform(-0.1, 0.1, dist.size)
    lat, lon = destination(lat0, lon0, az, dist)
    for i in range(dist.size):
        g = WGS84.Inverse(lat0[i], lon0[i], lat[i], lon[i])
        assert g["s12"] == pytest.approx(dist[i], rel=0.005)
        assert (g["azi1"] - az[i] + 180) % 360 - 180 == pytest.approx(0, abs=0.5)


def test_place_layout_matches_geodesic_direct(scenario):
    # Karney 2013 via geographiclib Direct: each place centre lies where its
    # east/north offset says, within 0.5% of the offset.
    for p in scenario.places.values():
        d = float(np.hypot(p.east_m, p.north_m))
        if d == 0:
            continue
        az = float(np.degrees(np.arctan2(p.east_m, p.north_m)))
        ref = WGS84.Direct(scenario.origin_lat, scenario.origin_lon, az, d)
        lat, lon = scenario.latlon(p.id)
        miss = WGS84.Inverse(ref["lat2"], ref["lon2"], lat, lon)["s12"]
        assert miss <= 0.005 * d


def test_places_spread_over_a_few_km_and_apart(scenario):
    ids = list(scenario.places)
    assert 8 <= len(ids) <= 12
    far = max(scenario.distance_m(scenario.home_id, i) for i in ids)
    assert 5000 < far < 30000  # an occasional trip destination several km away
    for i, a in enumerate(ids):
        for b in ids[i + 1:]:
            assert scenario.distance_m(a, b) > 300  # distinct places are not merged by clustering


# Coordinates recalled from memory (approximate, to about 0.1 degree).
LANDMARKS = {
    "Flores, Azores (westernmost island)": (39.45, -31.20),
    "Corvo, Azores": (39.70, -31.10),
    "Sao Miguel, Azores": (37.78, -25.50),
    "Bermuda": (32.30, -64.78),
    "Cape Race, Newfoundland": (46.66, -53.07),
    "Sable Island": (43.95, -59.90),
    "Cape Hatteras": (35.25, -75.53),
    "Madeira": (32.75, -17.00),
}


def _min_land_km(lat, lon) -> float:
    return min(WGS84.Inverse(lat, lon, a, b)["s12"] for a, b in LANDMARKS.values()) / 1000.0


def test_scenario_is_on_open_ocean(scenario):
    # geographiclib distances to the nearest landmasses of the central North
    # Atlantic (coordinates from memory): everything is more than 300 km out.
    assert _min_land_km(scenario.origin_lat, scenario.origin_lon) > 300
    for pid in scenario.places:
        assert _min_land_km(*scenario.latlon(pid)) > 300


def test_every_written_fix_is_on_open_ocean(inbox):
    box, files = inbox
    lats, lons = [], []
    for p in files:
        if _kind(p) == ".gpx":
            for m in re.finditer(r'lat="([-0-9.]+)" lon="([-0-9.]+)"', p.read_text()):
                lats.append(float(m.group(1)))
                lons.append(float(m.group(2)))
    assert lats
    # all fixes lie within 0.5 degree of the origin, and the box's corners are far from land
    assert max(abs(np.array(lats) - 35.0)) < 0.5 and max(abs(np.array(lons) + 45.0)) < 0.5
    for la in (34.5, 35.5):
        for lo in (-45.5, -44.5):
            assert _min_land_km(la, lo) > 300


# -- NMEA 0183 ----------------------------------------------------------------------
def _xor(body: str) -> str:
    # Independent re-implementation of the NMEA 0183 rule for the check below.
    return f"{functools.reduce(operator.xor, body.encode('ascii'), 0):02X}"


def test_every_written_nmea_sentence_has_a_correct_checksum(inbox):
    box, files = inbox
    nmea = [p for p in files if _kind(p) == ".nmea"]
    assert nmea
    n = 0
    for p in nmea:
        raw = p.read_bytes()
        assert raw.endswith(b"\r\n")
        for line in raw.decode("ascii").split("\r\n")[:-1]:
            m = re.fullmatch(r"\$([^*$]+)\*([0-9A-F]{2})", line)
            assert m, line
            assert _xor(m.group(1)) == m.group(2)
            n += 1
    assert n > 20


def test_nmea_fixes_agree_with_the_file_time_and_region(inbox):
    box, files = inbox
    for p in (q for q in files if _kind(q) == ".nmea"):
        for line in p.read_text().splitlines():
            f = line.split("*")[0].split(",")
            if f[0][3:] == "RMC" and f[2] == "A":
                lat = int(f[3][:2]) + float(f[3][2:]) / 60
                lon = -(int(f[5][:3]) + float(f[5][3:]) / 60)
                assert f[4] == "N" and f[6] == "W"
                assert abs(lat - 35.0) < 0.5 and abs(lon + 45.0) < 0.5
                t = datetime.strptime(f[9] + f[1][:6], "%d%m%y%H%M%S").replace(tzinfo=ZoneInfo("UTC"))
                first = datetime.strptime(STAMP.search(p.name).group(1), "%Y%m%dT%H%M%SZ").replace(
                    tzinfo=ZoneInfo("UTC"))
                assert 0 <= (t - first).total_seconds() < 3600


# -- GPX 1.1 -------------------------------------------------------------------------
GPX_NS = "{http://www.topografix.com/GPX/1/1}"
# GPX 1.1 wptType child sequence (topografix GPX 1.1 schema, from memory).
WPT_ORDER = ["ele", "time", "magvar", "geoidheight", "name", "cmt", "desc", "src", "link", "sym",
             "type", "fix", "sat", "hdop", "vdop", "pdop", "ageofdgpsdata", "dgpsid", "extensions"]


def test_gpx_files_are_structurally_valid_gpx_1_1(inbox):
    from defusedxml import ElementTree

    box, files = inbox
    gpx = [p for p in files if _kind(p) == ".gpx"]
    assert gpx
    for p in gpx:
        root = ElementTree.parse(p).getroot()
        assert root.tag == GPX_NS + "gpx"
        assert root.get("version") == "1.1" and root.get("creator")
        pts = root.findall(f"{GPX_NS}trk/{GPX_NS}trkseg/{GPX_NS}trkpt")
        assert pts
        for pt in pts:
            assert -90 <= float(pt.get("lat")) <= 90 and -180 <= float(pt.get("lon")) < 180
            names = [c.tag[len(GPX_NS):] for c in pt]
            assert names == sorted(names, key=WPT_ORDER.index)
            assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ", pt.find(GPX_NS + "time").text)


def test_gps_csv_has_the_contract_header(inbox):
    box, files = inbox
    csvs = [p for p in files if _kind(p) == ".gps.csv"]
    assert csvs
    for p in csvs:
        lines = p.read_text().splitlines()
        assert lines[0] in ("time,lat,lon", "time,lat,lon,accuracy_m")
        for row in lines[1:]:
            t = row.split(",")[0]
            assert datetime.fromisoformat(t.replace("Z", "+00:00")).tzinfo is not None


def test_gps_noise_is_mostly_5_to_30_m():
    # Consumer GPS horizontal error of about 5-30 m: common practice, no source.
    from agent.demo.generator import _gps_noise

    rng = np.random.default_rng(1)
    _, _, d_out = _gps_noise(rng, 5000, np.zeros(5000, bool))
    _, _, d_in = _gps_noise(rng, 5000, np.ones(5000, bool))
    for d in (d_out, d_in):
        share = np.mean((d >= 4) & (d <= 35))
        assert share > 0.85
        assert 5 <= np.median(d) <= 30


def test_some_gps_hours_carry_an_outlier_or_a_gap(scenario, policy, tmp_path):
    # Over 14 days the recorder must lose at least one hourly file and write at least
    # one fix several km off, or the intake's gap and outlier handling is never exercised.
    tl = simulate_days(scenario, START, 14, seed=SEED)
    from agent.demo.generator import _write_gps

    made = []
    for d in range(14):
        t0, t1 = tl.day_bounds(d)
        made += _write_gps(tl, d, t0, t1, tmp_path, policy.schedule, SEED)
    hours = sum(round((tl.day_bounds(d)[1] - tl.day_bounds(d)[0]) / 3600) for d in range(14))
    assert len(made) < hours
    jumps = 0
    for _, p in made:
        if p.name.endswith(".gps.csv"):
            rows = [r.split(",") for r in p.read_text().splitlines()[1:]]
            pts = [(float(r[1]), float(r[2])) for r in rows]
        elif p.name.endswith(".gpx"):
            pts = [(float(a), float(b)) for a, b in re.findall(r'lat="([-0-9.]+)" lon="([-0-9.]+)"', p.read_text())]
        else:
            continue
        for a, b in pairwise(pts):
            if WGS84.Inverse(a[0], a[1], b[0], b[1])["s12"] > 1500:
                jumps += 1
    assert jumps > 0


# -- audio -------------------------------------------------------------------------------
def test_wav_files_decode_at_declared_rate_and_duration(inbox, policy):
    # decoded independently by soundfile (libsndfile)
    import soundfile as sf

    box, files = inbox
    wavs = [p for p in files if _kind(p) == ".wav"]
    assert len(wavs) > 300
    rates, chans = Counter(), Counter()
    for p in wavs[::7]:
        info = sf.info(p)
        assert info.format == "WAV" and info.samplerate in (16000, 44100)
        assert info.duration == pytest.approx(policy.schedule.audio_snippet_seconds, abs=0.01)
        x, sr = sf.read(p)
        assert np.isfinite(x).all() and 0 < np.abs(x).max() < 1
        rates[sr] += 1
        chans[info.channels] += 1
    assert len(rates) == 2 and set(chans) <= {1, 2}


def _band_share(x, sr, lo, hi):
    from scipy.signal import welch

    f, pxx = welch(x, fs=sr, nperseg=2048)
    return pxx[(f >= lo) & (f < hi)].sum() / pxx.sum()


def test_quiet_room_shows_mains_hum():
    # a 50 Hz mains-appliance hum (50 Hz mains: common practice, no source): the
    # strongest low-frequency line sits on a multiple of 50 Hz
    x = synthesize("quiet_room", np.random.default_rng(3), sr=16000)
    from scipy.signal import welch

    f, pxx = welch(x, fs=16000, nperseg=8192)
    low = (f > 30) & (f < 400)
    assert abs(f[low][np.argmax(pxx[low])] % 50.0) < 3 or abs(f[low][np.argmax(pxx[low])] % 50.0) > 47


def test_soundscapes_differ_in_spectrum():
    # Welch spectra (scipy; common practice): the soundscapes' energy lies in different bands
    rng = np.random.default_rng(4)
    hi_share = {st: np.mean([_band_share(synthesize(st, rng), 16000, 1500, 8000) for _ in range(4)])
                for st in ("quiet_room", "cafe", "vehicle", "wind_gulls")}
    assert hi_share["cafe"] > hi_share["vehicle"]
    assert hi_share["cafe"] > hi_share["quiet_room"]
    assert hi_share["vehicle"] < 0.1


def test_soundscape_rejects_unknown_type():
    with pytest.raises(ValueError, match="sound_type must be one of"):
        synthesize("disco", np.random.default_rng(0))


def test_audio_sound_type_follows_the_truth(inbox, timeline):
    box, files = inbox
    types = Counter()
    for p in files:
        if _kind(p) == ".wav":
            t = datetime.strptime(STAMP.search(p.name).group(1), "%Y%m%dT%H%M%SZ").replace(
                tzinfo=ZoneInfo("UTC")).timestamp()
            types[timeline.sound_type_at(t + 1.5)] += 1
    assert None not in types
    assert types["quiet_room"] > 0 and len(types) >= 4


# -- accelerometry ----------------------------------------------------------------------
def _read_accel(p: Path):
    head = p.read_text().splitlines()[0]
    data = np.loadtxt(p, delimiter=",", skiprows=2)
    return head, data


def test_accel_files_have_the_declared_rate_and_unit(inbox, policy):
    # np.diff of the time column against the declared rate; 1 g = 9.80665 m/s^2
    # (standard gravity, CGPM 1901, from memory)
    box, files = inbox
    acc = [p for p in files if _kind(p) == ".accel.csv"]
    assert len(acc) > 300
    units = Counter()
    for p in acc[::11]:
        head, data = _read_accel(p)
        m = re.fullmatch(r"# unit=(g|m/s\^2) rate_hz=([0-9.]+)", head)
        assert m
        assert float(m.group(2)) == policy.schedule.accel_rate_hz
        assert p.read_text().splitlines()[1] == "time,x,y,z"
        dt = np.diff(data[:, 0])
        assert np.allclose(dt, 1.0 / policy.schedule.accel_rate_hz, atol=2e-3)
        assert data.shape[0] == round(policy.schedule.accel_burst_seconds * policy.schedule.accel_rate_hz)
        g = np.median(np.linalg.norm(data[:, 1:], axis=1))
        units[m.group(1)] += 1
        assert g == pytest.approx(1.0 if m.group(1) == "g" else 9.80665, rel=0.15)
    assert units["g"] > units["m/s^2"]


def test_walking_shows_a_2_hz_peak():
    # scipy.signal.welch (common practice): walking at about 2 steps/s peaks near 2 Hz
    from scipy.signal import welch

    rng = np.random.default_rng(5)
    t = 1.7e9 + np.arange(600) / 10.0
    a = accel_signal(np.array(["walk"] * 600), t, rng, 10.0)
    f, pxx = welch(np.linalg.norm(a, axis=1) - 1.0, fs=10.0, nperseg=256)
    assert 1.6 <= f[np.argmax(pxx)] <= 2.4


def test_still_is_gravity_plus_small_noise():
    # 1 g at rest and MEMS noise of a few mg: common practice, no source.
    rng = np.random.default_rng(6)
    t = 1.7e9 + np.arange(600) / 10.0
    a = accel_signal(np.array(["still"] * 600), t, rng, 10.0)
    norm = np.linalg.norm(a, axis=1)
    assert norm.mean() == pytest.approx(1.0, abs=0.02)
    assert 0.002 < norm.std() < 0.02


def test_written_walking_bursts_peak_near_2_hz(inbox, timeline):
    from scipy.signal import welch

    box, files = inbox
    checked = 0
    for p in files:
        if _kind(p) != ".accel.csv":
            continue
        head, data = _read_accel(p)
        t = data[:, 0]
        segs = {int(i) for i in timeline.segment_index(t)}
        if len(segs) != 1:
            continue
        s = timeline.segments[segs.pop()]
        if s["kind"] == "travel" and s["mode"] == "walk":
            scale = 9.80665 if "m/s^2" in head else 1.0
            f, pxx = welch(np.linalg.norm(data[:, 1:], axis=1) / scale - 1.0, fs=10.0, nperseg=256)
            assert 1.6 <= f[np.argmax(pxx)] <= 2.4
            checked += 1
    assert checked >= 1


# -- mood ------------------------------------------------------------------------------------
def test_mood_files_rate_every_policy_emotion_on_the_scale(inbox, policy):
    box, files = inbox
    sch = policy.schedule
    moods = [p for p in files if _kind(p) in (".mood.csv", ".mood.json")]
    assert len(moods) >= DAYS * sch.mood_prompts_per_day // 2
    for p in moods:
        if p.name.endswith(".json"):
            reports = json.loads(p.read_text())["reports"]
            rows = [(r["time"], r["ratings"]) for r in reports]
        else:
            head, *body = p.read_text().splitlines()
            cols = head.split(",")
            assert cols[0] == "time" and cols[1:] == list(sch.emotions)
            rows = [(r.split(",")[0], dict(zip(cols[1:], map(int, r.split(",")[1:]), strict=True))) for r in body]
        for t, ratings in rows:
            assert datetime.fromisoformat(t.replace("Z", "+00:00")).tzinfo is not None
            assert set(ratings) == set(sch.emotions)
            assert all(sch.mood_scale_min <= v <= sch.mood_scale_max and isinstance(v, int)
                       for v in ratings.values())


def test_mood_is_biased_by_place(scenario, policy):
    from agent.demo.generator import mood_ratings

    tl = simulate_days(scenario, START, 14, seed=SEED)
    sch = policy.schedule
    rng = np.random.default_rng(0)
    excited = {"sports_hall": [], "home": []}
    for s in tl.visits:
        if s["place_id"] in excited:
            for _ in range(5):
                r = mood_ratings(tl, (s["t_start"] + s["t_end"]) / 2, sch.emotions, 1, 7, rng)
                excited[s["place_id"]].append(r["excited"])
    assert np.mean(excited["sports_hall"]) > np.mean(excited["home"]) + 1


# -- files, names, determinism ----------------------------------------------------------------
def test_no_part_files_are_left(inbox):
    box, files = inbox
    assert not [p for p in box.iterdir() if p.name.endswith(".part")]
    assert sorted(files) == sorted(box.iterdir())


def test_every_name_carries_a_utc_stamp_inside_its_day(inbox, timeline):
    box, files = inbox
    lo, hi = timeline.start_utc, timeline.end_utc
    for p in files:
        m = STAMP.search(p.name)
        assert m, p.name
        t = datetime.strptime(m.group(1), "%Y%m%dT%H%M%SZ").replace(tzinfo=ZoneInfo("UTC")).timestamp()
        assert lo <= t < hi
    assert set(map(_kind, files)) == {".wav", ".gpx", ".nmea", ".gps.csv", ".accel.csv", ".mood.csv",
                                      ".mood.json"}


def test_stamp_is_iso_8601_basic_utc():
    assert stamp_utc(0) == "19700101T000000Z"


def _digest(files):
    import hashlib

    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in files}


def test_same_seed_gives_identical_bytes(timeline, policy, tmp_path):
    a = write_day(timeline, 0, tmp_path / "a", policy, seed=SEED)
    b = write_day(timeline, 0, tmp_path / "b", policy, seed=SEED)
    assert _digest(a) == _digest(b)


def test_different_seed_gives_different_files(timeline, policy, tmp_path):
    a = _digest(write_day(timeline, 0, tmp_path / "a", policy, seed=SEED))
    b = _digest(write_day(timeline, 0, tmp_path / "b", policy, seed=SEED + 1))
    same = set(a) & set(b)
    assert sum(a[k] == b[k] for k in same) == 0


def test_same_seed_gives_the_same_timeline(scenario):
    a = simulate_days(scenario, START, 7, seed=3)
    b = simulate_days(scenario, START, 7, seed=3)
    c = simulate_days(scenario, START, 7, seed=4)
    assert a.segments == b.segments
    assert a.segments != c.segments


# -- ground truth ------------------------------------------------------------------------------
def test_truth_tiles_every_day_without_gaps(timeline):
    segs = timeline.segments
    assert segs[0]["t_start"] == timeline.start_utc and segs[-1]["t_end"] == timeline.end_utc
    for a, b in pairwise(segs):
        assert a["t_end"] == b["t_start"] and a["t_end"] > a["t_start"]
    assert len(timeline.day_starts) == DAYS + 1


def test_day_bounds_follow_local_midnight_across_the_clock_change(timeline):
    # zoneinfo/tzdata: Atlantic/Azores goes from UTC+0 to UTC-1 on 25 October 2026
    tz = ZoneInfo("Atlantic/Azores")
    lengths = [timeline.day_bounds(d)[1] - timeline.day_bounds(d)[0] for d in range(DAYS)]
    assert lengths == [86400.0, 90000.0, 86400.0]
    for d in range(DAYS):
        local = datetime.fromtimestamp(timeline.day_bounds(d)[0], tz)
        assert (local.hour, local.minute) == (0, 0)


def test_truth_lookups(timeline, scenario):
    assert timeline.place_at(timeline.start_utc + 60) == scenario.home_id  # asleep at home
    assert timeline.place_at(timeline.start_utc - 1) is None
    trav = timeline.travels[0]
    mid = (trav["t_start"] + trav["t_end"]) / 2
    assert timeline.place_at(mid) is None
    assert timeline.sound_type_at(mid) in ("street", "vehicle")
    v = next(s for s in timeline.visits if s["place_id"] != scenario.home_id)
    assert timeline.sound_type_at((v["t_start"] + v["t_end"]) / 2) == scenario.places[v["place_id"]].sound


def test_truth_round_trips_through_json(timeline, tmp_path):
    path = write_truth(timeline, tmp_path / "truth.json")
    back = load_truth(path)
    assert back.segments == timeline.segments and back.day_starts == timeline.day_starts
    t = timeline.visits[3]["t_start"] + 10
    assert back.place_at(t) == timeline.place_at(t)


def test_fourteen_days_show_a_weekly_routine_with_irregularity(scenario):
    tl = simulate_days(scenario, START, 14, seed=0)
    tz = scenario.tz
    office_days = {datetime.fromtimestamp(v["t_start"], tz).weekday() for v in tl.visits
                   if v["place_id"] == "office"}
    assert office_days <= {0, 1, 2, 3, 4} and len(office_days) >= 4
    visited = {v["place_id"] for v in tl.visits}
    assert len(visited) >= 8
    modes = Counter(t["mode"] for t in tl.travels)
    assert modes["walk"] and modes["cycle"]
    starts = [datetime.fromtimestamp(v["t_start"], tz) for v in tl.visits if v["place_id"] == "office"]
    first = [s.hour * 60 + s.minute for s in starts if s.hour < 11]
    assert np.std(first) > 3  # arrival times vary from day to day


def test_routine_spans_all_modes_and_sick_days_over_many_seeds(scenario):
    modes, sick = Counter(), 0
    for seed in range(6):
        tl = simulate_days(scenario, START, 14, seed=seed)
        modes.update(t["mode"] for t in tl.travels)
        sick += len(tl.sick_days)
        if tl.sick_days:
            d = tl.sick_days[0]
            t0, t1 = tl.day_bounds(d)
            assert all(tl.place_at(t) == scenario.home_id for t in np.arange(t0 + 1, t1, 600))
    assert set(modes) == {"walk", "cycle", "vehicle"} and sick >= 1


# -- scenario validation -------------------------------------------------------------------------
def _raw():
    import tomllib

    from agent.demo.scenario import default_scenario_path

    return tomllib.loads(default_scenario_path().read_text())


def test_scenario_unknown_place_in_routine_is_named():
    raw = _raw()
    raw["routine"][0]["place"] = "moon"
    with pytest.raises(DataError, match=r"routine\[0\]\.place.*'moon'"):
        Scenario.from_dict(raw, "x.toml")


def test_scenario_missing_key_names_file_and_key():
    raw = _raw()
    del raw["places"][1]["sound"]
    with pytest.raises(DataError, match=r"x\.toml: \[places\[1\]\.sound\] required key is missing"):
        Scenario.from_dict(raw, "x.toml")


def test_scenario_must_be_marked_fictional():
    raw = _raw()
    raw["scenario"]["fictional"] = False
    with pytest.raises(DataError, match="fictional"):
        Scenario.from_dict(raw, "x.toml")


def test_scenario_bad_weekday_is_named():
    raw = _raw()
    raw["routine"][2]["days"] = ["funday"]
    with pytest.raises(DataError, match=r"routine\[2\]\.days"):
        Scenario.from_dict(raw, "x.toml")


def test_scenario_missing_file_is_named(tmp_path):
    with pytest.raises(DataError, match="no such scenario file"):
        Scenario.load(tmp_path / "nope.toml")


def test_simulate_days_rejects_zero_days(scenario):
    with pytest.raises(ValueError, match="days must be a positive integer"):
        simulate_days(scenario, START, 0, seed=0)


# -- simulated answers ------------------------------------------------------------------------------
def _device_episodes(tl, scenario, rng):
    """Stand-in episodes: one per local hour, with shuffled device ids for the places."""
    ids = list(scenario.places)
    dev = {p: f"P{i}" for i, p in enumerate(rng.permutation(ids))}
    tz = scenario.tz
    eps = []
    t = tl.start_utc
    while t + 3600 <= tl.end_utc:
        loc = datetime.fromtimestamp(t, tz)
        true = tl.dominant_place(t, t + 3600)
        eps.append({"key": loc.isoformat(timespec="minutes"), "utc": t, "date": loc.date().isoformat(),
                    "hour": loc.hour, "weekday": loc.weekday(), "place": dev.get(true) if true else None})
        t += 3600
    return eps, dev


def _trials(eps, rng, n=200):
    with_place = [e for e in eps if e["place"]]
    all_ids = sorted({e["place"] for e in with_place})
    trials = []
    for i, k in enumerate(rng.choice(len(with_place), n, replace=False)):
        e = with_place[k]
        foils = [x for x in rng.permutation(all_ids) if x != e["place"]][:3]
        opts = list(rng.permutation([e["place"]] + foils))
        trials.append({"trial_id": f"T{i}", "episode": e["key"], "hour": e["hour"], "weekday": e["weekday"],
                       "options": opts, "correct": e["place"], "issued_at": 2.0e9})
    return trials


def test_simulated_answers_are_noisy_but_informed(scenario):
    tl = simulate_days(scenario, START, 21, seed=1)
    rng = np.random.default_rng(0)
    eps, dev = _device_episodes(tl, scenario, rng)
    trials = _trials(eps, rng)
    ans = simulate_answers(trials, eps, tl, seed=0)
    assert len(ans) == len(trials)
    assert all(a["source"] == "simulated" for a in ans)
    assert all(a["choice"] is None or a["choice"] in t["options"] for a, t in zip(ans, trials, strict=True))
    correct = np.mean([a["choice"] == t["correct"] for a, t in zip(ans, trials, strict=True)])
    assert 0.4 < correct < 0.98  # above the 25% chance level, below perfect
    assert all(a["rt_s"] > 0 for a in ans)
    times = [a["answered_at"] for a in ans]
    assert times == sorted(times) and times[0] > 2.0e9


def test_simulated_answers_lean_towards_habitual_places(scenario):
    tl = simulate_days(scenario, START, 21, seed=1)
    rng = np.random.default_rng(2)
    eps, dev = _device_episodes(tl, scenario, rng)
    trials = _trials(eps, rng, 300)
    ans = simulate_answers(trials, eps, tl, seed=0)
    wrong = Counter(a["choice"] for a, t in zip(ans, trials, strict=True) if a["choice"] not in (None, t["correct"]))
    offered = Counter(o for a, t in zip(ans, trials, strict=True) if a["choice"] not in (None, t["correct"])
                      for o in t["options"] if o != t["correct"])
    # home is the habitual place: among wrong answers it is picked more often than its share of foils
    assert wrong[dev["home"]] / sum(wrong.values()) > offered[dev["home"]] / sum(offered.values())


def test_simulated_answers_are_deterministic(scenario):
    tl = simulate_days(scenario, START, 14, seed=1)
    rng = np.random.default_rng(0)
    eps, _ = _device_episodes(tl, scenario, rng)
    trials = _trials(eps, rng, 50)
    assert simulate_answers(trials, eps, tl, seed=5) == simulate_answers(trials, eps, tl, seed=5)
    assert simulate_answers(trials, eps, tl, seed=5) != simulate_answers(trials, eps, tl, seed=6)


def test_unknown_episode_is_answered_with_a_skip(scenario):
    tl = simulate_days(scenario, START, 3, seed=1)
    ans = simulate_answers([{"trial_id": "X", "episode": "nope", "options": ["P1", "P2"], "issued_at": 1.0}],
                           [], tl, seed=0)
    assert ans[0]["choice"] is None and ans[0]["source"] == "simulated"


def test_simulated_place_names(scenario):
    tl = simulate_days(scenario, START, 14, seed=1)
    rng = np.random.default_rng(0)
    eps, dev = _device_episodes(tl, scenario, rng)
    eps.append(dict(eps[0], place="P99"))  # a device split of home
    names = simulate_place_names(eps, tl)
    assert names[dev["home"]] == "home"
    assert names["P99"] == "home (2)"
    assert names[dev["office"]] == "the office"
    assert true_place_map(eps, tl)[dev["office"]] == "office"


# -- schedule ------------------------------------------------------------------------------------
def _policy_with(policy, **schedule):
    from agent.policy import policy_from_dict

    raw = policy.as_dict()
    raw["schedule"].update(schedule)
    return policy_from_dict(raw)


def _gps_times(files):
    out = []
    for p in files:
        if p.name.endswith(".gpx"):
            out += re.findall(r"<trkpt[^>]*>.*?<time>([^<]+)</time>", p.read_text())
        elif p.name.endswith(".gps.csv"):
            out += [r.split(",")[0] for r in p.read_text().splitlines()[1:]]
        elif p.name.endswith(".nmea"):
            out += [ln.split(",")[1] for ln in p.read_text().splitlines() if ln[3:6] == "RMC" and ",A," in ln]
    return out


def test_gps_fixes_follow_a_sparse_policy_schedule(timeline, policy, tmp_path):
    sparse = _policy_with(policy, gps_interval_minutes=90)
    files = [p for p in write_day(timeline, 0, tmp_path, sparse, seed=SEED) if "gps_" in p.name]
    hours = (timeline.day_bounds(0)[1] - timeline.day_bounds(0)[0]) / 3600
    assert 0 < len(files) <= hours * 90 / 60 / 1.4  # one file per scheduled fix at most, not one per hour
    assert 0 < len(set(_gps_times(files))) <= 16


def test_audio_and_accel_follow_the_policy_schedule(inbox, timeline, policy):
    box, files = inbox
    sch = policy.schedule
    t0, t1 = timeline.day_bounds(0)
    day0 = [p for p in files if t0 <= datetime.strptime(STAMP.search(p.name).group(1), "%Y%m%dT%H%M%SZ")
            .replace(tzinfo=ZoneInfo("UTC")).timestamp() < t1]
    expected = (t1 - t0) / (60 * sch.audio_interval_minutes)
    n_audio = sum(_kind(p) == ".wav" for p in day0)
    n_accel = sum(_kind(p) == ".accel.csv" for p in day0)
    assert 0.95 * expected <= n_audio <= expected
    assert 0.95 * expected <= n_accel <= expected
    for p in day0:
        if _kind(p) == ".wav":
            t = datetime.strptime(STAMP.search(p.name).group(1), "%Y%m%dT%H%M%SZ").replace(
                tzinfo=ZoneInfo("UTC")).timestamp()
            assert (t - t0) % (60 * sch.audio_interval_minutes) <= 4


def _band_energies(x, sr):
    from scipy.signal import welch

    f, pxx = welch(x, fs=sr, nperseg=1024)
    edges = np.geomspace(40, 7000, 17)
    return np.log10([pxx[(f >= a) & (f < b)].sum() + 1e-20 for a, b in pairwise(edges)])


def test_sound_types_are_learnable_from_band_energies():
    # Log band energies from scipy's Welch spectrum and a cross-validated
    # logistic regression (scikit-learn; common practice): the classes carry
    # enough signal to be learned from a few examples each.
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import cross_val_score
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    from agent.demo.scenario import SOUND_TYPES

    rng = np.random.default_rng(8)
    X, y = [], []
    for st in SOUND_TYPES:
        for _ in range(12):
            X.append(_band_energies(synthesize(st, rng, sr=16000), 16000))
            y.append(st)
    acc = cross_val_score(make_pipeline(StandardScaler(), LogisticRegression(max_iter=3000)),
                          np.array(X), np.array(y), cv=3).mean()
    assert acc > 0.8


def test_snippets_of_one_type_vary_in_level_and_events():
    rng = np.random.default_rng(9)
    for st in ("cafe", "wind_gulls", "quiet_room"):
        xs = [synthesize(st, rng, sr=16000).astype(float) for _ in range(6)]
        levels = [10 * np.log10(np.mean(x * x)) for x in xs]
        assert np.ptp(levels) > 2.0  # per-snippet level variation (dB)
        assert not np.allclose(xs[0], xs[1])


def test_routine_keeps_wall_clock_times_on_the_clock_change_day(scenario):
    # zoneinfo: on Sunday 25 October 2026 the Azores day has 25 hours; the bakery
    # trip at 09:30 local must stay near 09:30 local, not shift by an hour.
    tz = ZoneInfo("Atlantic/Azores")
    hours = []
    for seed in range(20):
        tl = simulate_days(scenario, START, 2, seed=seed)
        for v in tl.visits:
            local = datetime.fromtimestamp(v["t_start"], tz)
            if v["place_id"] == "bakery" and local.day == 25:
                hours.append(local.hour + local.minute / 60)
    assert len(hours) >= 5 and 9.05 < np.median(hours) < 10.2  # an hour early would be about 8.5


def test_scenario_unknown_sound_type_is_named():
    raw = _raw()
    raw["places"][0]["sound"] = "disco"
    with pytest.raises(DataError, match=r"places\[0\]\.sound.*one of"):
        Scenario.from_dict(raw, "x.toml")


def test_gps_fixes_lie_near_the_true_place(inbox, timeline, scenario):
    # geographiclib distances from each GPX fix taken during a visit to the
    # visited place's centre: GPS noise plus wandering, apart from rare outliers.
    box, files = inbox
    d = []
    for p in files:
        if _kind(p) != ".gpx":
            continue
        text = p.read_text()
        for la, lo, t in re.findall(r'lat="([-0-9.]+)" lon="([-0-9.]+)"><ele>[^<]*</ele><time>([^<]+)</time>', text):
            ts = datetime.fromisoformat(t.replace("Z", "+00:00")).timestamp()
            pid = timeline.place_at(ts)
            if pid is not None:
                plat, plon = scenario.latlon(pid)
                d.append(WGS84.Inverse(float(la), float(lo), plat, plon)["s12"])
    d = np.array(d)
    assert d.size > 50
    assert 4 < np.median(d) < 40
    assert np.mean(d < 100) > 0.97
