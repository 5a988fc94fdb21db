"""The coding stage over the vault: features in, codes out, features discarded on schedule.

Coding only: hourly episodes are built from the codes by :mod:`agent.episodes`.
"""

from __future__ import annotations

import math
import time as _time
from collections import Counter
from dataclasses import dataclass, field


from .motion import ENMO_MVPA_MG, ENMO_SEDENTARY_MG, MOTION_BANDS, enmo_band, motion_features
from .places import PlaceCodebook
from .sounds import CentroidCodebook


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
                "problems": self.problems}


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
    n: Counter = Counter(old.get("sizes", {}))
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


def run_codebook(home, policy, vault, now: float | None = None, *, ledger=None) -> CodebookReport:
    """Code the vault's features into IDs, refit when due, discard features.

    Hourly episodes are built from the codes afterwards, by
    :func:`agent.episodes.build_episodes`.

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
    for (rid, s), pid in zip(stays, ids, strict=False):
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
        for (rid, a), sid in zip(uncoded, sound.assign([a["vec"] for _, a in uncoded]), strict=False):
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
                for i, (w, lab) in enumerate(zip(wins, labels, strict=False)):
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
    if ledger is not None:
        ledger.append("coded", counts={k: int(v) for k, v in report.coded.items()})
    return report
