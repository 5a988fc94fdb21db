"""Stay points: where someone stayed, from a time-ordered track of fixes.

Terminology (Li et al. 2008; Zheng et al. 2009)
    *anchor*: the first fix of a candidate stay.
    *stay*: a maximal run of consecutive fixes, all within ``radius_m`` (D) of
    the anchor, spanning at least ``min_minutes`` (T) from the anchor's time to
    the last fix's; summarised by its arrival and leaving times and the mean
    position of its fixes.
    *open segment*: the run at the end of the buffer that has not yet been left;
    it may continue into the next file, so it is returned as ``leftover`` and
    not decided yet.

The published pseudo-code takes the first fix *outside* D as the end of the
stay; here the stay ends at the last fix *inside* D, so the centroid and the
leaving time use only fixes that belong to the stay.
"""

from __future__ import annotations

import numpy as np

from ..geo import haversine_m
from .geo import mean_position


def extract_stays(fixes, radius_m: float, min_minutes: float, *, flush: bool = False,
                  max_gap_s: float | None = None):
    """Detect stay points in time-ordered fixes.

    Parameters
    ----------
    fixes : sequence of dict
        Fixes with ``t`` (Unix s), ``lat`` and ``lon`` (degrees), sorted by
        time, as stored in the ``gps_fixes`` table.
    radius_m : float
        D, the distance threshold in metres (``codebook.stay_radius_m``).
    min_minutes : float
        T, the minimum dwell in minutes (``codebook.stay_min_minutes``).
    flush : bool, default False
        Close the open segment at the end too (a stay if it lasts T), leaving
        nothing over: for the end of the study or a buffer that reached
        ``retention.gps_buffer_minutes``.
    max_gap_s : float, optional
        If given, a silence between consecutive fixes longer than this ends the
        current segment: a stay is not inferred across a long loss of signal.

    Returns
    -------
    stays : list of dict
        ``{"t_start", "t_end", "lat", "lon", "n"}`` per stay, in time order.
    leftover : list of dict
        The fixes of the open segment (empty when ``flush``), the very dict
        objects passed in; pass them first in the next call.
    """
    if radius_m <= 0 or not np.isfinite(radius_m):
        raise ValueError(f"radius_m must be a positive number of metres, got {radius_m!r}")
    if min_minutes < 0 or not np.isfinite(min_minutes):
        raise ValueError(f"min_minutes must be a non-negative number, got {min_minutes!r}")
    fixes = list(fixes)
    n = len(fixes)
    if n == 0:
        return [], []
    t = np.array([f["t"] for f in fixes], dtype=float)
    lat = np.array([f["lat"] for f in fixes], dtype=float)
    lon = np.array([f["lon"] for f in fixes], dtype=float)
    if np.any(np.diff(t) < 0):
        raise ValueError("fixes must be sorted by time")
    min_s = 60.0 * float(min_minutes)
    stays: list[dict] = []
    i = 0
    while i < n:
        j = _run_end(t, lat, lon, i, radius_m, max_gap_s)   # first fix not in the run
        if j == n and not flush:
            return stays, fixes[i:]
        if t[j - 1] - t[i] >= min_s:
            clat, clon = mean_position(lat[i:j], lon[i:j])
            stays.append({"t_start": float(t[i]), "t_end": float(t[j - 1]),
                          "lat": clat, "lon": clon, "n": int(j - i)})
            i = j
        else:
            i += 1
    return stays, []


def _run_end(t, lat, lon, i, radius_m, max_gap_s) -> int:
    """Index of the first fix after ``i`` beyond ``radius_m`` of fix ``i`` (or ``len``).

    Distances are computed in growing blocks, so a moving track costs about
    one block per anchor instead of the whole remaining buffer.
    """
    n = len(t)
    lo, size = i + 1, 32
    while lo < n:
        hi = min(n, lo + size)
        out = np.atleast_1d(haversine_m(lat[i], lon[i], lat[lo:hi], lon[lo:hi])) > radius_m
        if max_gap_s is not None:
            out |= (t[lo:hi] - t[lo - 1:hi - 1]) > max_gap_s
        hit = np.flatnonzero(out)
        if len(hit):
            return lo + int(hit[0])
        lo, size = hi, size * 2
    return n
