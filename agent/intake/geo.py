"""Positions for stay points: the mean of a small cluster of fixes.

Distances come from :mod:`agent.geo`.
"""

from __future__ import annotations


import numpy as np

__all__ = ["mean_position"]


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
