"""Codebooks: features in, coarse stable IDs out (``docs/graph.md``, Codebook).

Terminology
-----------
place
    A cluster of stay points found by DBSCAN on the haversine metric; ID
    ``P1``, ``P2``, ...  A stay within ``place_radius_m`` of no known place is
    *pending* until ``place_min_stays`` stays confirm a new place.
sound class
    A k-means cluster of standardised audio feature vectors; ID ``S1``, ...
motion class
    Either an ENMO intensity band from published wrist cut-points
    (``sedentary``, ``light``, ``mvpa``) or a k-means cluster of accelerometry
    window features (``M1``, ...), as ``policy.codebook.motion_method`` says.
stable ID
    Once an ID has been handed out it keeps its meaning.  A refit maps new
    clusters onto existing IDs by Hungarian matching on centroids
    (:func:`scipy.optimize.linear_sum_assignment`) behind a distance gate;
    unmatched clusters get fresh IDs (never reused), and merges and splits are
    appended to the codebook's ``history`` instead of relabelling anything
    already coded.

The codebooks (centroids, scaler parameters, ID map, history) are stored
encrypted in the vault table ``codebook`` under the rids ``place``, ``sound``
and ``motion`` and are never exported.
"""

from __future__ import annotations

import math
import time as _time
import warnings
from collections import Counter
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from .geo import EARTH_RADIUS_M, haversine_m

# ENMO cut-points for the non-dominant wrist in adults, in milli-g.
# Sedentary below 44.8 mg: Hildebrand M, Hansen BH, van Hees VT, Ekelund U (2017)
#   "Evaluation of raw acceleration sedentary thresholds in children and adults",
#   Scand J Med Sci Sports 27(12):1814-1823.
# Moderate-to-vigorous at or above 100.6 mg: Hildebrand M, van Hees VT, Hansen BH,
#   Ekelund U (2014) "Age group comparability of raw accelerometer output from
#   wrist- and hip-worn monitors", Med Sci Sports Exerc 46(9):1816-1824.
# Both values are the ActiGraph wrist figures as quoted in public re-implementations
# of these papers (an R function `hildebrand2014(sed_cp = 44.8, mpa_cp = 100.6,
# vpa_cp = 428.8)`), found with our search tool; the primary tables were not read.
ENMO_SEDENTARY_MG = 44.8
ENMO_MVPA_MG = 100.6
MOTION_BANDS = ("sedentary", "light", "mvpa")

# A refitted sound or motion centroid keeps an old ID only if it lies within
# this root-mean-square distance per standardised dimension of the old centroid
# (half a standard deviation per feature: design choice, no source).
CENTROID_GATE_SD = 0.5
# A refit keeps the current k unless another k's silhouette is higher by more
# than this (design choice: demo silhouettes of neighbouring k differ by ~0.01).
SILHOUETTE_HYSTERESIS = 0.02
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


def _next_id(prefix: str, n: int) -> str:
    return f"{prefix}{n}"


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
        pid = _next_id("P", self.next)
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
        ids = [act[k]["id"] if dd <= self.radius_m else None for k, dd in zip(j.tolist(), dist.tolist())]
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
        t_first = {c: min(float(stays[i].get("t_start", 0.0)) for i in np.flatnonzero(labels == c))
                   for c in clusters}
        clusters.sort(key=lambda c: (t_first[c],) + spherical_mean(lat[labels == c], lon[labels == c]))
        cent = [spherical_mean(lat[labels == c], lon[labels == c]) for c in clusters]
        votes = [Counter(near[i] for i in np.flatnonzero(labels == c) if near[i] is not None)
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
            for r, c in zip(rows.tolist(), cols.tolist()):
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
        for i, pid in enumerate(out):
            if pid is not None:
                members.setdefault(pid, []).append(i)
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


# -- centroid codebooks (sound, k-means motion) --------------------------------------

class CentroidCodebook:
    """k-means classes over standardised feature vectors with stable IDs.

    Parameters
    ----------
    prefix : str
        ID prefix, ``"S"`` for sound, ``"M"`` for motion.
    k_min, k_max : int
        Range searched for k by silhouette (``k_min == k_max`` fixes k).
    seed : int
        ``random_state`` of k-means and of the silhouette subsample.
    state : dict, optional
        A stored codebook (:meth:`to_dict`).
    """

    def __init__(self, prefix: str, k_min: int = 3, k_max: int = 8, seed: int = 0,
                 state: Mapping | None = None, kind: str = "sound"):
        if not (isinstance(k_min, (int, np.integer)) and isinstance(k_max, (int, np.integer))
                and 2 <= k_min <= k_max):
            raise ValueError(f"k range [{k_min!r}, {k_max!r}]: expected integers with 2 <= k_min <= k_max")
        self.prefix = prefix
        self.kind = kind
        self.k_min, self.k_max, self.seed = int(k_min), int(k_max), int(seed)
        state = dict(state or {})
        self.classes: list[dict] = [dict(c) for c in state.get("classes", [])]
        self.mean = np.asarray(state.get("scaler_mean", []), dtype=np.float64)
        self.scale = np.asarray(state.get("scaler_scale", []), dtype=np.float64)
        self.next = int(state.get("next", 1))
        self.history: list[dict] = [dict(h) for h in state.get("history", [])]
        self.fitted_at = state.get("fitted_at")
        self.silhouette = state.get("silhouette")
        self.k = state.get("k")
        self.scores = state.get("scores", {})

    @property
    def fitted(self) -> bool:
        return bool(self.active()) and self.mean.size > 0

    def to_dict(self) -> dict:
        return {"kind": self.kind, "prefix": self.prefix, "classes": self.classes,
                "scaler_mean": self.mean.tolist(), "scaler_scale": self.scale.tolist(),
                "next": self.next, "history": self.history, "fitted_at": self.fitted_at,
                "silhouette": self.silhouette, "k": self.k, "scores": self.scores}

    def active(self) -> list[dict]:
        return [c for c in self.classes if c.get("active", True)]

    def _z(self, x):
        return (np.asarray(x, float) - self.mean) / self.scale

    def _new_id(self) -> str:
        cid = _next_id(self.prefix, self.next)
        self.next += 1
        return cid

    def fit(self, x, now: float | None = None) -> list[str]:
        """Refit on feature rows ``x`` (n, d); return the ID of each row."""
        from scipy.optimize import linear_sum_assignment
        from sklearn.cluster import KMeans
        from sklearn.exceptions import ConvergenceWarning
        from threadpoolctl import threadpool_limits
        from sklearn.metrics import silhouette_score
        from sklearn.preprocessing import StandardScaler

        now = _time.time() if now is None else float(now)
        x = np.asarray(x, dtype=np.float64)
        if x.ndim != 2 or len(x) < self.k_min + 1:
            raise ValueError(f"{self.kind} codebook: need at least {self.k_min + 1} feature rows of "
                             f"equal length to fit, got shape {x.shape}")
        scaler = StandardScaler().fit(x)
        scale = np.where(scaler.scale_ > 0, scaler.scale_, 1.0)
        z = (x - scaler.mean_) / scale
        best = None
        scores = {}
        fits = {}
        k_hi = min(self.k_max, len(x) - 1)
        for k in range(self.k_min, k_hi + 1):
            # one thread: k-means on a few thousand rows is faster without OpenMP
            # fan-out, and the agent is a background process (measured: 10x on a busy 2-core VM)
            with warnings.catch_warnings(), threadpool_limits(1):
                # duplicate rows can leave fewer distinct clusters than k; handled below
                warnings.simplefilter("ignore", ConvergenceWarning)
                km = KMeans(n_clusters=k, n_init=10, random_state=self.seed).fit(z)
            if len(set(km.labels_.tolist())) < k:
                continue
            s = float(silhouette_score(z, km.labels_, sample_size=min(len(z), 2000),
                                       random_state=self.seed))
            scores[str(k)] = round(s, 6)
            fits[k] = (s, k, km)
            if best is None or s > best[0] + 1e-9:
                best = (s, k, km)
        if best is None:
            raise ValueError(f"{self.kind} codebook: features do not separate into >= 2 clusters")
        # hysteresis: keep the current number of classes unless another k is clearly
        # better, so near-ties in silhouette do not retire and mint IDs at every refit
        prev = len(self.active())
        if prev in fits and fits[prev][0] >= best[0] - SILHOUETTE_HYSTERESIS:
            best = fits[prev]
        sil, k, km = best
        cz = km.cluster_centers_
        craw = cz * scale + scaler.mean_
        labels = km.labels_

        # match the new centres onto the active old ones, in the new standardised space
        old = self.active()
        match: dict[int, str] = {}
        d = None
        if old:
            oz = (np.array([c["centroid"] for c in old]) - scaler.mean_) / scale
            d = np.sqrt(((cz[:, None, :] - oz[None, :, :]) ** 2).mean(axis=2))  # RMS per dimension
            rows, cols = linear_sum_assignment(np.where(d <= CENTROID_GATE_SD, d, 1e6))
            for r, c in zip(rows.tolist(), cols.tolist()):
                if d[r, c] <= CENTROID_GATE_SD:
                    match[r] = old[c]["id"]
        # new classes ordered by size (largest first) so IDs do not depend on k-means' label order
        sizes = np.bincount(labels, minlength=k)
        order = sorted(range(k), key=lambda r: (-int(sizes[r]), tuple(np.round(cz[r], 9))))
        ids: dict[int, str] = {}
        for r in order:
            if r in match:
                ids[r] = match[r]
                continue
            cid = self._new_id()
            ids[r] = cid
            near_old = None
            if d is not None:
                c = int(d[r].argmin())
                if d[r, c] <= 2 * CENTROID_GATE_SD and old[c]["id"] in match.values():
                    near_old = old[c]["id"]
            if near_old:
                self.history.append({"event": "split", "from": near_old, "into": [near_old, cid], "t": now})
            else:
                self.history.append({"event": "new", "id": cid, "t": now})
        matched = set(match.values())
        for c_old in old:
            if c_old["id"] in matched:
                continue
            c_old["active"] = False
            into = None
            if d is not None:
                r = int(d[:, old.index(c_old)].argmin())
                if d[r, old.index(c_old)] <= 2 * CENTROID_GATE_SD:
                    into = ids[r]
            if into:
                self.history.append({"event": "merge", "ids": [into, c_old["id"]], "into": into, "t": now})
            else:
                self.history.append({"event": "retire", "id": c_old["id"], "t": now})
        by_id = {c["id"]: c for c in self.classes}
        for r in range(k):
            cid = ids[r]
            entry = by_id.get(cid)
            if entry is None:
                entry = {"id": cid}
                self.classes.append(entry)
                by_id[cid] = entry
            entry.update({"centroid": craw[r].tolist(), "n": int(sizes[r]), "active": True})
        self.mean, self.scale = scaler.mean_.copy(), scale.copy()
        self.fitted_at, self.silhouette, self.k, self.scores = now, sil, int(k), scores
        return [ids[int(lab)] for lab in labels]

    def assign(self, x) -> list[str]:
        """Nearest active class (standardised Euclidean distance) of each row."""
        if not self.fitted:
            raise ValueError(f"{self.kind} codebook is not fitted yet")
        x = np.asarray(x, dtype=np.float64)
        if len(x) == 0:
            return []
        act = self.active()
        cz = self._z(np.array([c["centroid"] for c in act]))
        z = self._z(x)
        j = ((z[:, None, :] - cz[None, :, :]) ** 2).sum(axis=2).argmin(axis=1)
        return [act[i]["id"] for i in j.tolist()]

    def quality(self) -> dict:
        act = self.active()
        return {"k": len(act), "sizes": {c["id"]: int(c.get("n", 0)) for c in act},
                "silhouette": self.silhouette, "silhouette_by_k": self.scores,
                "merges": sum(h["event"] == "merge" for h in self.history),
                "splits": sum(h["event"] == "split" for h in self.history), "fitted_at": self.fitted_at}


# -- motion cut-points ---------------------------------------------------------------

def enmo_band(enmo_g: float) -> str:
    """Intensity band of a window's mean ENMO (in g) from the wrist cut-points above."""
    mg = float(enmo_g) * 1000.0
    if not math.isfinite(mg):
        raise ValueError(f"ENMO must be a finite number of g, got {enmo_g!r}")
    if mg < ENMO_SEDENTARY_MG:
        return "sedentary"
    if mg < ENMO_MVPA_MG:
        return "light"
    return "mvpa"


def motion_features(window) -> list[float]:
    """Window row ``[t, enmo_g, sd_g, dom_hz, active]`` to the k-means features."""
    return [float(window[1]), float(window[2]), float(window[3])]


# -- the stage over the vault -------------------------------------------------------------

@dataclass
class CodebookReport:
    """What a codebook run did (counts and quality only, no content)."""

    coded: dict = field(default_factory=dict)
    deleted: dict = field(default_factory=dict)
    pending_stays: int = 0
    refitted: list = field(default_factory=list)
    quality: dict = field(default_factory=dict)
    events: list = field(default_factory=list)
    episodes: int | None = None
    problems: list = field(default_factory=list)

    @property
    def n_places(self) -> int:
        return int((self.quality.get("place") or {}).get("n_places", 0))

    @property
    def n_sounds(self) -> int:
        return int((self.quality.get("sound") or {}).get("k", 0))

    @property
    def n_motions(self) -> int:
        return int((self.quality.get("motion") or {}).get("k", 0))

    def to_dict(self) -> dict:
        return {"n_places": self.n_places, "n_sounds": self.n_sounds, "n_motions": self.n_motions,
                "coded": self.coded, "deleted": self.deleted, "pending_stays": self.pending_stays,
                "refitted": self.refitted, "quality": self.quality, "events": self.events,
                "episodes": self.episodes, "problems": self.problems}


def _load(vault, policy):
    c = policy.codebook
    place = PlaceCodebook(c.place_radius_m, c.place_min_stays, vault.get("codebook", "place"))
    sound = CentroidCodebook("S", c.sound_k_min, c.sound_k_max, seed=policy.quiz.seed,
                             state=vault.get("codebook", "sound"), kind="sound")
    mstate = vault.get("codebook", "motion")
    if c.motion_method == "kmeans":
        if mstate and mstate.get("method") != "kmeans":
            mstate = {k: v for k, v in mstate.items() if k in ("history",)}
        motion = CentroidCodebook("M", c.motion_k, c.motion_k, seed=policy.quiz.seed,
                                  state=mstate, kind="motion")
    else:
        motion = None
    return place, sound, motion


def _motion_state(policy, motion, sizes: Counter, prev) -> dict:
    if motion is not None:
        d = motion.to_dict()
        d["method"] = "kmeans"
        return d
    old = dict(prev or {})
    n = Counter(old.get("sizes", {}))
    n.update(sizes)
    return {"kind": "motion", "method": "enmo_cutpoints", "ids": list(MOTION_BANDS),
            "cutpoints_mg": {"sedentary_below": ENMO_SEDENTARY_MG, "mvpa_from": ENMO_MVPA_MG},
            "sizes": {k: int(n.get(k, 0)) for k in MOTION_BANDS},
            "history": old.get("history", [])}


def codebook_quality(vault) -> dict:
    """Cluster quality of the stored codebooks, for ``lethe status --json`` (no content)."""
    out = {}
    p = vault.get("codebook", "place")
    out["place"] = PlaceCodebook(state=p).quality() if p else None
    s = vault.get("codebook", "sound")
    out["sound"] = CentroidCodebook("S", state=s, kind="sound").quality() if s else None
    m = vault.get("codebook", "motion")
    if not m:
        out["motion"] = None
    elif m.get("method") == "kmeans":
        q = CentroidCodebook("M", 2, 2, state=m, kind="motion").quality()
        q["method"] = "kmeans"
        out["motion"] = q
    else:
        out["motion"] = {"method": "enmo_cutpoints", "k": len(MOTION_BANDS), "sizes": m.get("sizes", {}),
                         "cutpoints_mg": m.get("cutpoints_mg")}
    return out


def _refit_due(cb: CentroidCodebook, policy, now: float) -> bool:
    if not cb.fitted:
        return True
    return now - float(cb.fitted_at or 0.0) >= float(policy.codebook.refit_days) * 86400.0


def run_codebook(home, policy, vault, now: float | None = None, *, ledger=None,
                 episodes: bool = True) -> CodebookReport:
    """Code the vault's features into IDs, refit when due, discard features, build episodes.

    Features retention (``policy.retention.feature_days``):

    * stays are deleted as soon as they are coded; a pending stay is kept only
      while it is younger than ``feature_days``;
    * audio features (and accelerometry windows under ``kmeans``) are kept after
      coding only while younger than ``feature_days`` *and* only if
      ``refit_days > 0`` (they are the training set of the next refit); with
      cut-points the accelerometry rows are deleted as soon as they are coded;
    * anything older than ``feature_days`` is deleted, coded or not.

    Parameters
    ----------
    home : Home or path
    policy : Policy
    vault : Vault
    now : float, optional
        Unix seconds; default the clock.
    ledger : Ledger, optional
        If given, a ``coded`` event with counts is appended after the commit.
    episodes : bool
        Also run :func:`agent.episodes.build_episodes` (default).
    """
    now = _time.time() if now is None else float(now)
    feature_cut = now - float(policy.retention.feature_days) * 86400.0
    keep_for_refit = float(policy.codebook.refit_days) > 0
    snippet_s = float(policy.schedule.audio_snippet_seconds)
    report = CodebookReport()
    place, sound, motion = _load(vault, policy)
    coded_rids = {rid for rid, _ in vault.items("coded")}

    new_coded: list[tuple[str, dict]] = []
    deletes: list[tuple[str, str]] = []

    # places
    stays = list(vault.items("stays"))
    stays.sort(key=lambda kv: float(kv[1]["t_start"]))
    ids = place.update([s for _, s in stays], now=now) if stays else []
    pending = 0
    for (rid, s), pid in zip(stays, ids):
        if pid is not None:
            new_coded.append((rid, {"kind": "place", "t": float(s["t_start"]), "t_end": float(s["t_end"]),
                                    "id": pid}))
            deletes.append(("stays", rid))
        elif float(s["t_end"]) < feature_cut:
            deletes.append(("stays", rid))
        else:
            pending += 1
    report.pending_stays = pending

    # sound
    audio = sorted(vault.items("audio_features"), key=lambda kv: float(kv[1]["t"]))
    if audio and (_refit_due(sound, policy, now)):
        x = [a["vec"] for _, a in audio]
        if len(x) >= max(sound.k_min + 1, 10):
            try:
                sound.fit(x, now=now)
                report.refitted.append("sound")
            except ValueError as e:  # degenerate features: keep the old codebook (if any)
                report.problems.append(f"sound refit skipped: {e}")
    uncoded = [(rid, a) for rid, a in audio if rid not in coded_rids]
    if sound.fitted and uncoded:
        for (rid, a), sid in zip(uncoded, sound.assign([a["vec"] for _, a in uncoded])):
            new_coded.append((rid, {"kind": "sound", "t": float(a["t"]), "t_end": float(a["t"]) + snippet_s,
                                    "id": sid}))
            coded_rids.add(rid)
    for rid, a in audio:
        if float(a["t"]) < feature_cut or (rid in coded_rids and not keep_for_refit):
            deletes.append(("audio_features", rid))

    # motion
    accel = sorted(vault.items("accel_features"), key=lambda kv: float(kv[1]["t0"]))
    band_sizes: Counter = Counter()
    if motion is not None and accel and _refit_due(motion, policy, now):
        rows = [motion_features(w) for _, a in accel for w in a["windows"]]
        if len(rows) >= max(motion.k_min + 1, 10):
            try:
                motion.fit(rows, now=now)
                report.refitted.append("motion")
            except ValueError as e:
                report.problems.append(f"motion refit skipped: {e}")
    for rid, a in accel:
        is_coded = f"{rid}:0" in coded_rids or (not a["windows"] and rid in coded_rids)
        window_s = float(a["window_s"])
        if not is_coded:
            # a window without a finite ENMO cannot be classified; it is dropped uncoded
            wins = [w for w in a["windows"] if all(math.isfinite(float(v)) for v in w[:4])]
            labels = None
            if motion is None:
                labels = [enmo_band(w[1]) for w in wins]
                band_sizes.update(labels)
            elif motion.fitted and wins:
                labels = motion.assign([motion_features(w) for w in wins])
            if labels is not None:
                for i, (w, lab) in enumerate(zip(wins, labels)):
                    new_coded.append((f"{rid}:{i}", {"kind": "motion", "t": float(w[0]),
                                                     "t_end": float(w[0]) + window_s, "id": lab}))
                    coded_rids.add(f"{rid}:{i}")
                is_coded = True
        old = float(a["t0"]) < feature_cut
        if old or (is_coded and (motion is None or not keep_for_refit)):
            deletes.append(("accel_features", rid))

    with vault.transaction():
        for rid, row in new_coded:
            vault.put("coded", rid, row)
        for table, rid in deletes:
            vault.delete(table, rid)
        vault.upsert("codebook", "place", place.to_dict())
        if sound.fitted or sound.history:
            vault.upsert("codebook", "sound", sound.to_dict())
        vault.upsert("codebook", "motion", _motion_state(policy, motion, band_sizes,
                                                          vault.get("codebook", "motion")))
    report.coded = dict(Counter(row["kind"] for _, row in new_coded))
    report.deleted = dict(Counter(t for t, _ in deletes))
    events = place.history + sound.history + (motion.history if motion else [])
    report.events = [h for h in events if h.get("t") == now]
    report.quality = codebook_quality(vault)
    if episodes:
        from .episodes import build_episodes

        report.episodes = len(build_episodes(home, policy, vault, now=now))
    if ledger is not None:
        ledger.append("coded", counts={k: int(v) for k, v in report.coded.items()})
    return report
