"""Sound classes (and k-means motion classes): k-means over standardised features with stable IDs.

See :mod:`agent.codebook` for the terms.
"""

from __future__ import annotations

import time as _time
import warnings
from collections.abc import Mapping

import numpy as np

from .ids import next_id

# A refitted sound or motion centroid keeps an old ID only if it lies within
# this root-mean-square distance per standardised dimension of the old centroid
# (half a standard deviation per feature: design choice, no source).
CENTROID_GATE_SD = 0.5
# A refit keeps the current k unless another k's silhouette is higher by more
# than this (design choice: demo silhouettes of neighbouring k differ by ~0.01).
SILHOUETTE_HYSTERESIS = 0.02
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
        cid = next_id(self.prefix, self.next)
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
            for r, c in zip(rows.tolist(), cols.tolist(), strict=False):
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


