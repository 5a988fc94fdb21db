"""Stay-point extraction (Li et al. 2008; Zheng et al. 2009) and haversine distances."""

from __future__ import annotations

import numpy as np
import pytest

from agent.geo import EARTH_RADIUS_M, haversine_m
from agent.intake.geo import mean_position
from agent.intake.staypoints import extract_stays

T0 = 1793800800.0
# One degree of latitude is about 111.2 km, so 1e-4 deg is about 11 m.
HOME = (38.5300, -28.6300)
CAFE = (38.5400, -28.6200)   # about 1.4 km from HOME


def fix(t_min, lat, lon):
    return {"t": T0 + 60.0 * t_min, "lat": lat, "lon": lon, "acc_m": 10.0}


def around(place, t_mins, jitter=1e-4, seed=0):
    rng = np.random.default_rng(seed)
    return [fix(m, place[0] + jitter * rng.uniform(-1, 1), place[1] + jitter * rng.uniform(-1, 1))
            for m in t_mins]


# --- haversine against geographiclib (Karney 2013) --------------------------
@pytest.mark.parametrize("a, b", [
    ((38.53, -28.63), (38.54, -28.62)),        # a short hop
    ((51.4778, -0.0015), (40.7128, -74.0060)),  # transatlantic
    ((0.0, 0.0), (0.0, 90.0)),                  # along the equator
    ((-33.86, 151.21), (35.68, 139.69)),        # across the equator
    ((89.9, 0.0), (89.9, 180.0)),               # across the pole
])
def test_haversine_agrees_with_geographiclib_geodesic_within_half_a_percent(a, b):
    # Karney 2013 geodesics on WGS 84, via geographiclib; the sphere of the
    # IUGG mean radius is within 0.5 % of the ellipsoid (Moritz 1980).
    from geographiclib.geodesic import Geodesic

    ref = Geodesic.WGS84.Inverse(a[0], a[1], b[0], b[1])["s12"]
    assert haversine_m(a[0], a[1], b[0], b[1]) == pytest.approx(ref, rel=0.005)


def test_haversine_quarter_meridian_on_the_sphere():
    # Definition: pole to equator is a quarter of the great circle.
    assert haversine_m(0.0, 0.0, 90.0, 0.0) == pytest.approx(np.pi / 2 * EARTH_RADIUS_M)


def test_haversine_broadcasts_over_arrays():
    d = haversine_m(0.0, 0.0, np.array([0.0, 1.0]), np.array([0.0, 0.0]))
    assert d.shape == (2,) and d[0] == 0.0


def test_mean_position_across_the_antimeridian():
    lat, lon = mean_position([10.0, 10.0], [179.9, -179.9])
    assert lat == pytest.approx(10.0) and abs(lon) == pytest.approx(180.0)


# --- stay points on a hand-built track --------------------------------------
def track():
    # 0-30 min at HOME, 35-45 min walking, 50-80 min at CAFE, 85 min en route.
    walk = [fix(35, 38.5333, -28.6267), fix(40, 38.5366, -28.6233), fix(45, 38.5383, -28.6216)]
    return (around(HOME, range(0, 31, 5), seed=1) + walk
            + around(CAFE, range(50, 81, 5), seed=2) + [fix(85, 38.5500, -28.6000)])


def test_hand_built_track_gives_two_stays_with_their_times():
    stays, leftover = extract_stays(track(), radius_m=100.0, min_minutes=20.0)
    assert [(s["t_start"], s["t_end"], s["n"]) for s in stays] == [
        (T0, T0 + 30 * 60, 7), (T0 + 50 * 60, T0 + 80 * 60, 7)]
    assert haversine_m(stays[0]["lat"], stays[0]["lon"], *HOME) < 20.0
    assert haversine_m(stays[1]["lat"], stays[1]["lon"], *CAFE) < 20.0
    assert [f["t"] for f in leftover] == [T0 + 85 * 60]


def test_centroid_is_the_mean_position_of_the_stay_fixes():
    fixes = around(HOME, range(0, 31, 5), seed=4) + [fix(35, *CAFE), fix(40, *CAFE)]
    stays, _ = extract_stays(fixes, 100.0, 20.0)
    inside = fixes[:7]
    assert stays[0]["lat"] == pytest.approx(np.mean([f["lat"] for f in inside]))
    assert stays[0]["lon"] == pytest.approx(np.mean([f["lon"] for f in inside]))


def test_a_dwell_shorter_than_t_is_not_a_stay():
    fixes = around(HOME, range(0, 16, 5)) + [fix(20, *CAFE), fix(25, 38.56, -28.60)]
    stays, _ = extract_stays(fixes, 100.0, 20.0)
    assert stays == []


def test_the_open_segment_is_left_over_and_completes_in_the_next_call():
    first = around(HOME, range(0, 16, 5), seed=5)          # 15 min so far: undecided
    stays, leftover = extract_stays(first, 100.0, 20.0)
    assert stays == [] and leftover == first
    more = around(HOME, range(20, 31, 5), seed=6) + [fix(35, *CAFE)]
    stays, leftover = extract_stays(leftover + more, 100.0, 20.0)
    assert len(stays) == 1 and stays[0]["t_start"] == T0 and stays[0]["t_end"] == T0 + 30 * 60
    assert [f["t"] for f in leftover] == [T0 + 35 * 60]


def test_flush_closes_the_open_segment():
    fixes = around(HOME, range(0, 41, 5))
    assert extract_stays(fixes, 100.0, 20.0)[0] == []
    stays, leftover = extract_stays(fixes, 100.0, 20.0, flush=True)
    assert len(stays) == 1 and stays[0]["n"] == 9 and leftover == []


def test_a_long_silence_splits_segments_when_max_gap_is_given():
    fixes = around(HOME, [0, 5, 10]) + around(HOME, [200, 205, 210], seed=9) + [fix(215, *CAFE)]
    assert len(extract_stays(fixes, 100.0, 20.0)[0]) == 1
    assert extract_stays(fixes, 100.0, 20.0, max_gap_s=3600.0)[0] == []


def test_fix_just_outside_d_of_the_anchor_ends_the_stay():
    # 1e-3 deg of latitude is about 111 m > D = 100 m.
    fixes = [fix(m, 38.53, -28.63) for m in range(0, 21, 5)] + [fix(25, 38.531, -28.63)]
    stays, leftover = extract_stays(fixes, 100.0, 20.0)
    assert stays[0]["n"] == 5 and len(leftover) == 1


def test_unsorted_fixes_are_refused():
    with pytest.raises(ValueError, match="sorted"):
        extract_stays([fix(5, *HOME), fix(0, *HOME)], 100.0, 20.0)


def test_bad_radius_is_refused_with_the_expected_range():
    with pytest.raises(ValueError, match="radius_m must be a positive"):
        extract_stays([], 0.0, 20.0)


def test_empty_input_gives_nothing():
    assert extract_stays([], 100.0, 20.0) == ([], [])


# --- the block-wise search agrees with a plain restatement of the definition ---
from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402


def naive_stays(fixes, radius_m, min_minutes):
    """Li et al. 2008 as a direct double loop (stay ends at the last fix inside D)."""
    stays, i, n = [], 0, len(fixes)
    while i < n:
        j = i + 1
        while j < n and haversine_m(fixes[i]["lat"], fixes[i]["lon"], fixes[j]["lat"], fixes[j]["lon"]) <= radius_m:
            j += 1
        if j == n:
            return stays, fixes[i:]
        if fixes[j - 1]["t"] - fixes[i]["t"] >= 60 * min_minutes:
            stays.append((fixes[i]["t"], fixes[j - 1]["t"], j - i))
            i = j
        else:
            i += 1
    return stays, []


@settings(max_examples=60, deadline=None)
@given(steps=st.lists(st.tuples(st.floats(0.5, 15.0), st.sampled_from([0.0, 0.0, 0.0, 3e-4, 2e-3]),
                                st.floats(-1.0, 1.0)), min_size=1, max_size=120))
def test_extract_stays_agrees_with_the_naive_definition(steps):
    # Random walks: mostly standing still, sometimes small or large moves.
    t, lat, lon, fixes = 0.0, 38.53, -28.63, []
    for dt_min, size, direction in steps:
        t += dt_min
        lat += size * direction
        lon += size * (1 - abs(direction))
        fixes.append(fix(t, lat, lon))
    stays, leftover = extract_stays(fixes, 100.0, 20.0)
    ref_stays, ref_left = naive_stays(fixes, 100.0, 20.0)
    assert [(s["t_start"], s["t_end"], s["n"]) for s in stays] == ref_stays
    assert leftover == ref_left


def test_long_stay_spanning_several_search_blocks():
    # 100 fixes within D (more than the first two blocks of 32 and 64), then away.
    fixes = around(HOME, range(0, 100), jitter=2e-4, seed=11) + [fix(100, *CAFE)]
    stays, leftover = extract_stays(fixes, 100.0, 20.0)
    assert [(s["n"], s["t_end"] - s["t_start"]) for s in stays] == [(100, 99 * 60.0)]
    assert stays == [dict(stays[0])] and len(leftover) == 1


def test_leftover_holds_the_callers_own_fix_objects():
    fixes = around(HOME, range(0, 11, 5))
    _, leftover = extract_stays(fixes, 100.0, 20.0)
    assert all(a is b for a, b in zip(leftover, fixes, strict=True)) and len(leftover) == 3


def test_scalar_and_array_haversine_paths_agree():
    rng = np.random.default_rng(5)
    a = rng.uniform([-90, -180, -90, -180], [90, 180, 90, 180], size=(50, 4))
    vec = haversine_m(a[:, 0], a[:, 1], a[:, 2], a[:, 3])
    assert np.allclose([haversine_m(*map(float, r)) for r in a], vec, rtol=1e-12)
