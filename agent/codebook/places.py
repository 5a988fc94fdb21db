"""Places: DBSCAN clusters of stay points on the haversine metric, with stable IDs ``P1``, ``P2``...

See :mod:`agent.codebook` for the terms.
"""

from __future__ import annotations

import time as _time
from collections import Counter
from collections.abc import Mapping, Sequence

import numpy as np

from ..geo import EARTH_RADIUS_M, haversine_m
from .ids import next_id

# A place cluster keeps an old ID if its centroid lies within this many place
# radii of the old centroid, or if some of its stays lie within one radius of it
# (a cluster's centroid can drift by up to its radius: design choice).
PLACE_GATE_RADII = 2.0


# -- geometry ---------------------------------------------------------------------

def _to_xyz(lat, lon) -> np.ndarray:
    la, lo = np.radians(lat), np.radians(lon)
    return np.stack([np.cos(la) * np.cos(lo), np.cos(la) * np.sin(lo), np.sin(la)], axis=-1)


def _from_xyz(v) -> tuple[float, float]:
    v = np.asarray(v, dtype=np.float64)
    v = v / np.linalg.norm(v)
    return float(np.degrees(np.arcsin(np.clip(v[2], -1, 1)))), float(np.degrees(np.arctan2(v[1], v[0])))


def spherical_mean(lats, lons, weights=None) -> tuple[float, float]:
    """Mean position on the sphere (normalised mean of unit vectors)."""
    xyz = _to_xyz(np.asarray(lats, float), np.asarray(lons, float))
    w = np.ones(len(xyz)) if weights is None else np.asarray(weights, float)
    return _from_xyz((xyz * w[:, None]).sum(axis=0))


def cluster_places(lat, lon, *, radius_m: float, min_stays: int) -> np.ndarray:
    """DBSCAN labels (``-1`` = noise) of points in degrees, on the haversine metric."""
    from sklearn.cluster import DBSCAN

    if radius_m <= 0:
        raise ValueError(f"radius_m must be > 0 metres, got {radius_m!r}")
    if min_stays < 1:
        raise ValueError(f"min_stays must be a positive integer, got {min_stays!r}")
    x = np.radians(np.column_stack([np.asarray(lat, float), np.asarray(lon, float)]))
    if len(x) == 0:
        return np.zeros(0, dtype=np.int64)
    db = DBSCAN(eps=radius_m / EARTH_RADIUS_M, min_samples=int(min_stays), metric="haversine",
                algorithm="ball_tree")
    return db.fit_predict(x).astype(np.int64)


# -- places -------------------------------------------------------------------------

class PlaceCodebook:
    """Stable place IDs from stay points.

    Parameters
    ----------
    radius_m : float
        DBSCAN ``eps`` in metres (``policy.codebook.place_radius_m``).
    min_stays : int
        DBSCAN ``min_samples`` (``policy.codebook.place_min_stays``).
    state : dict, optional
        A stored codebook (:meth:`to_dict`).
    """

    kind = "place"

    def __init__(self, radius_m: float = 75.0, min_stays: int = 2, state: Mapping | None = None):
        if not (isinstance(radius_m, (int, float)) and radius_m > 0):
            raise ValueError(f"radius_m must be a positive number of metres, got {radius_m!r}")
        if not (isinstance(min_stays, (int, np.integer)) and min_stays >= 1):
            raise ValueError(f"min_stays must be a positive integer, got {min_stays!r}")
        self.radius_m = float(radius_m)
        self.min_stays = int(min_stays)
        state = dict(state or {})
        self.places: list[dict] = [dict(p) for p in state.get("places", [])]
        self.next = int(state.get("next", 1))
        self.history: list[dict] = [dict(h) for h in state.get("history", [])]
        self.fitted_at = state.get("fitted_at")
        self.silhouette = state.get("silhouette")

    def to_dict(self) -> dict:
        return {"kind": "place", "places": self.places, "next": self.next, "history": self.history,
                "fitted_at": self.fitted_at, "silhouette": self.silhouette,
                "radius_m": self.radius_m, "min_stays": self.min_stays}

    # -- helpers --
    def active(self) -> list[dict]:
        return [p for p in self.places if not p.get("merged_into")]

    def resolve(self, pid: str | None) -> str | None:
        """Follow ``merged_into`` links to the surviving ID."""
        seen = set()
        by_id = {p["id"]: p for p in self.places}
        while pid is not None and by_id.get(pid, {}).get("merged_into") and pid not in seen:
            seen.add(pid)
            pid = by_id[pid]["merged_into"]
        return pid

    def _new_id(self) -> str:
        pid = next_id("P", self.next)
        self.next += 1
        return pid

    def nearest(self, lat, lon) -> tuple[list[str | None], np.ndarray]:
        """Nearest active place within ``radius_m`` of each point (or ``None``) and the distances."""
        act = self.active()
        lat = np.asarray(lat, float)
        lon = np.asarray(lon, float)
        if not act or len(lat) == 0:
            return [None] * len(lat), np.full(len(lat), np.inf)
        plat = np.array([p["lat"] for p in act])
        plon = np.array([p["lon"] for p in act])
        d = haversine_m(lat[:, None], lon[:, None], plat[None, :], plon[None, :])
        j = d.argmin(axis=1)
        dist = d[np.arange(len(lat)), j]
        ids = [act[k]["id"] if dd <= self.radius_m else None for k, dd in zip(j.tolist(), dist.tolist(), strict=False)]
        return ids, dist

    # -- the refit --
    def update(self, stays: Sequence[Mapping], now: float | None = None) -> list[str | None]:
        """Cluster ``stays`` (with the known places), return an ID or ``None`` (pending) per stay.

        Known places keep their IDs: clusters are matched onto them by the
        Hungarian algorithm on centroid distance; clusters that match none
        become new places; merges and splits are recorded in :attr:`history`.
        """
        from scipy.optimize import linear_sum_assignment

        now = _time.time() if now is None else float(now)
        n = len(stays)
        if n == 0:
            return []
        lat = np.array([float(s["lat"]) for s in stays])
        lon = np.array([float(s["lon"]) for s in stays])
        labels = cluster_places(lat, lon, radius_m=self.radius_m, min_stays=self.min_stays)
        near, _ = self.nearest(lat, lon)
        act = self.active()
        act_ids = [p["id"] for p in act]
        clusters = sorted(set(labels.tolist()) - {-1})
        # order clusters by their earliest stay so new IDs follow time, not input order
        t_first = {c: min(float(stays[int(i)].get("t_start", 0.0)) for i in np.flatnonzero(labels == c))
                   for c in clusters}
        clusters.sort(key=lambda c: (t_first[c],) + spherical_mean(lat[labels == c], lon[labels == c]))
        cent = [spherical_mean(lat[labels == c], lon[labels == c]) for c in clusters]
        votes: list[Counter[str]] = [Counter(str(near[i]) for i in np.flatnonzero(labels == c) if near[i] is not None)
                 for c in clusters]

        match: dict[int, str] = {}
        d = None
        if clusters and act:
            clat = np.array([c[0] for c in cent])[:, None]
            clon = np.array([c[1] for c in cent])[:, None]
            d = haversine_m(clat, clon, np.array([p["lat"] for p in act])[None, :],
                            np.array([p["lon"] for p in act])[None, :])
            allowed = d <= PLACE_GATE_RADII * self.radius_m
            for ci, v in enumerate(votes):
                for pid in v:
                    allowed[ci, act_ids.index(pid)] = True
            # prefer clusters that hold stays of the place, then closeness
            vote_m = np.array([[votes[ci].get(pid, 0) for pid in act_ids] for ci in range(len(clusters))])
            cost = np.where(allowed, d - 1e3 * self.radius_m * np.minimum(vote_m, 1), 1e12)
            rows, cols = linear_sum_assignment(cost)
            for r, c in zip(rows.tolist(), cols.tolist(), strict=False):
                if allowed[r, c]:
                    match[r] = act_ids[c]

        cluster_id: dict[int, str] = {}
        matched_places = set(match.values())
        for ci in range(len(clusters)):
            if ci in match:
                pid = match[ci]
                cluster_id[ci] = pid
                absorbed = sorted((q for q in votes[ci] if q != pid and q not in matched_places),
                                  key=lambda q: int(q[1:]))
                if absorbed:
                    by_id = {p["id"]: p for p in self.places}
                    for q in absorbed:
                        by_id[q]["merged_into"] = pid
                        matched_places.add(q)
                    self.history.append({"event": "merge", "ids": [pid] + absorbed, "into": pid,
                                         "t": now})
            else:
                pid = self._new_id()
                cluster_id[ci] = pid
                # a split: the cluster holds stays of a known place, or lies within the
                # matching gate of a known place that another cluster kept
                parents = sorted(votes[ci], key=lambda q: int(q[1:]))
                if not parents and d is not None:
                    close = [(float(d[ci, k]), act_ids[k]) for k in range(len(act_ids))
                             if d[ci, k] <= PLACE_GATE_RADII * self.radius_m and act_ids[k] in matched_places]
                    parents = [min(close)[1]] if close else []
                if parents:
                    self.history.append({"event": "split", "from": parents[0],
                                         "into": [parents[0], pid], "t": now})
                else:
                    self.history.append({"event": "new", "id": pid, "t": now})
                self.places.append({"id": pid, "lat": cent[ci][0], "lon": cent[ci][1], "n": 0,
                                    "merged_into": None})

        out: list[str | None] = []
        lab = labels.tolist()
        cindex = {c: ci for ci, c in enumerate(clusters)}
        for i in range(n):
            if lab[i] >= 0:
                out.append(cluster_id[cindex[lab[i]]])
            else:
                out.append(self.resolve(near[i]))

        # centroid update: weighted spherical mean of the old centre and the new members
        by_id = {p["id"]: p for p in self.places}
        members: dict[str, list[int]] = {}
        for i, member_of in enumerate(out):
            if member_of is not None:
                members.setdefault(member_of, []).append(i)
        for pid, idx in members.items():
            p = by_id[pid]
            w_old = float(p.get("n", 0))
            lats = np.concatenate([[p["lat"]], lat[idx]])
            lons = np.concatenate([[p["lon"]], lon[idx]])
            w = np.concatenate([[w_old], np.ones(len(idx))])
            if w_old == 0:
                lats, lons, w = lat[idx], lon[idx], np.ones(len(idx))
            p["lat"], p["lon"] = spherical_mean(lats, lons, w)
            p["n"] = int(w_old + len(idx))
        self.fitted_at = now
        self.silhouette = _place_silhouette(lat, lon, labels)
        return out

    def quality(self) -> dict:
        act = self.active()
        return {"n_places": len(act), "sizes": {p["id"]: int(p.get("n", 0)) for p in act},
                "silhouette": self.silhouette, "merges": sum(h["event"] == "merge" for h in self.history),
                "splits": sum(h["event"] == "split" for h in self.history), "fitted_at": self.fitted_at}


def _place_silhouette(lat, lon, labels) -> float | None:
    from sklearn.metrics import silhouette_score

    keep = labels >= 0
    if len(set(labels[keep].tolist())) < 2 or keep.sum() <= len(set(labels[keep].tolist())):
        return None
    x = np.radians(np.column_stack([lat[keep], lon[keep]]))
    return float(silhouette_score(x, labels[keep], metric="haversine"))


