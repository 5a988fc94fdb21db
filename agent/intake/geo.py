"""Great-circle distances on a spherical Earth.

The haversine formula on a sphere of the IUGG mean Earth radius
R1 = 6 371 008.8 m (Moritz 1980, *Geodetic Reference System 1980*) is within
about 0.5 % of the WGS 84 geodesic everywhere; the tests compare it with
geographiclib's geodesic solution (Karney 2013).  Stay points and places work at
tens to hundreds of metres, where this error is centimetres.
"""

from __future__ import annotations

import math

import numpy as np

EARTH_RADIUS_M = 6371008.8


def haversine_m(lat1, lon1, lat2, lon2):
    """Great-circle distance in metres between points given in decimal degrees.

    Parameters
    ----------
    lat1, lon1, lat2, lon2 : float or array_like
        Coordinates in degrees (WGS 84 latitude and longitude); arrays broadcast.

    Returns
    -------
    float or numpy.ndarray
        Distance in metres on a sphere of radius :data:`EARTH_RADIUS_M`.
    """
    if type(lat1) is type(lon1) is type(lat2) is type(lon2) is float:
        return _haversine_scalar(lat1, lon1, lat2, lon2)
    p1 = np.radians(lat1)
    p2 = np.radians(lat2)
    dp = p2 - p1
    dl = np.radians(np.asarray(lon2) - np.asarray(lon1))
    a = np.sin(dp / 2.0) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(dl / 2.0) ** 2
    # Clip guards against a rounding overshoot above 1 for antipodal points.
    d = 2.0 * EARTH_RADIUS_M * np.arcsin(np.sqrt(np.clip(a, 0.0, 1.0)))
    return float(d) if np.ndim(d) == 0 else d


def _haversine_scalar(lat1: float, lon1: float, lat2: float, lon2: float) -> float:
    # The same formula with the math module: ~20x faster than numpy on scalars.
    p1, p2 = math.radians(lat1), math.radians(lat2)
    a = (math.sin((p2 - p1) / 2.0) ** 2
         + math.cos(p1) * math.cos(p2) * math.sin(math.radians(lon2 - lon1) / 2.0) ** 2)
    return 2.0 * EARTH_RADIUS_M * math.asin(math.sqrt(min(max(a, 0.0), 1.0)))


def mean_position(lat, lon):
    """Arithmetic mean of latitudes and longitudes in degrees.

    Adequate for the small clusters of a stay point (within a few hundred
    metres); longitudes are unwrapped around the first point so that a cluster
    straddling the antimeridian does not average to the other side of the Earth.
    """
    lat = np.asarray(lat, dtype=float)
    lon = np.asarray(lon, dtype=float)
    ref = lon[0]
    lon = ref + (lon - ref + 180.0) % 360.0 - 180.0
    m = float(lon.mean())
    m = (m + 180.0) % 360.0 - 180.0
    return float(lat.mean()), m
