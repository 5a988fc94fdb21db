"""Great-circle distances on a spherical Earth: the one haversine of the package.

The haversine formula on a sphere of the IUGG mean Earth radius
R1 = 6 371 008.8 m of the GRS 80 ellipsoid (Moritz 2000, "Geodetic Reference
System 1980", J. Geodesy 74).  Over short distances it differs from the WGS 84
geodesic by -0.56 % to +0.45 % (the ellipsoid's radii of curvature span
6 335 to 6 400 km); stay points and places work at tens to hundreds of metres,
where that is centimetres.  The tests compare it with geographiclib (Karney 2013),
on the WGS 84 ellipsoid and on the sphere of radius R1 (where it is exact).
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["EARTH_RADIUS_M", "haversine_m"]

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
        Distance in metres on a sphere of radius :data:`EARTH_RADIUS_M`; a
        float when every argument is a scalar.
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
