"""agent.geo.haversine_m against geographiclib (Karney 2013, "Algorithms for geodesics")."""

from __future__ import annotations

import numpy as np
import pytest
from geographiclib.geodesic import Geodesic

from agent.geo import EARTH_RADIUS_M, haversine_m

PAIRS = [
    ((38.53, -28.63), (38.54, -28.62)),        # a short hop
    ((51.4778, -0.0015), (40.7128, -74.0060)),  # transatlantic
    ((0.0, 0.0), (0.0, 90.0)),                  # along the equator
    ((-33.86, 151.21), (35.68, 139.69)),        # across the equator
    ((89.9, 0.0), (89.9, 180.0)),               # across the pole
    ((0.0, 0.0), (0.0, 179.9)),                 # nearly antipodal
]


@pytest.mark.parametrize("a, b", PAIRS)
def test_haversine_is_exact_on_the_sphere(a, b):
    # geographiclib with flattening 0 solves the geodesic on a sphere of radius R1:
    # there the haversine formula is exact (up to rounding).
    ref = Geodesic(EARTH_RADIUS_M, 0.0).Inverse(a[0], a[1], b[0], b[1])["s12"]
    assert haversine_m(a[0], a[1], b[0], b[1]) == pytest.approx(ref, rel=1e-9)


@pytest.mark.parametrize("a, b", PAIRS)
def test_haversine_within_0_56_percent_of_the_wgs84_geodesic(a, b):
    # WGS 84 radii of curvature span a(1-e^2) to a/sqrt(1-e^2): -0.56 % .. +0.45 % of R1.
    ref = Geodesic.WGS84.Inverse(a[0], a[1], b[0], b[1])["s12"]
    assert haversine_m(a[0], a[1], b[0], b[1]) == pytest.approx(ref, rel=5.6e-3)


def test_earth_radius_is_the_grs80_mean_radius():
    # R1 = (2a + b) / 3 of GRS 80 (Moritz 2000): a = 6378137 m, f = 1/298.257222101.
    a = 6378137.0
    b = a * (1 - 1 / 298.257222101)
    assert pytest.approx((2 * a + b) / 3, abs=0.05) == EARTH_RADIUS_M


def test_arrays_broadcast_and_scalars_give_floats():
    lat = np.array([0.0, 10.0])
    d = haversine_m(lat[:, None], 0.0, lat[None, :], 0.0)
    assert d.shape == (2, 2)
    assert d[0, 1] == pytest.approx(haversine_m(0.0, 0.0, 10.0, 0.0), rel=1e-12)
    assert isinstance(haversine_m(0.0, 0.0, 1.0, 1.0), float)
