"""The rolling GPS buffer: validated fixes wait in the vault only until they fold into stays.

Terminology
-----------
fix
    One validated position, vault table ``gps_fixes``, rid ``item:i``,
    payload ``{"t", "lat", "lon", "acc_m"}`` (encrypted like every record).
stay
    A dwell of at least ``codebook.stay_min_minutes`` within
    ``codebook.stay_radius_m`` (stay points: Li et al. 2008; Zheng et al. 2009),
    vault table ``stays``, rid ``f"{t_start:.0f}"``, payload
    ``{"t_start", "t_end", "lat", "lon", "n"}``.
buffer horizon
    ``retention.gps_buffer_minutes`` before the newest buffered fix, or before
    the clock when pruning (:func:`prune`), whichever is later.

:func:`fold` runs inside the transaction that stored a GPS file's fixes (see
:meth:`agent.intake.pipeline.Intake.commit`), so a crash leaves either the old
buffer or the new buffer and its stays, never half of each.  After it:

* every closed stay is in ``stays`` (``put``: an existing rid is left alone, so
  running it twice adds nothing);
* fixes folded into a closed stay are deleted;
* fixes older than the buffer horizon are deleted even if still unfolded, so
  raw coordinates never stay longer than the policy allows.  A stay still
  open at the horizon is first closed at the horizon (it is stored as a stay
  ending there, and the rest of the dwell becomes a following stay at the
  same place), so a long stay at one place is not lost to the horizon.
"""

from __future__ import annotations

from dataclasses import dataclass

FIXES = "gps_fixes"
STAYS = "stays"


@dataclass
class FoldReport:
    fixes_before: int = 0
    stays_new: int = 0
    fixes_deleted: int = 0
    fixes_left: int = 0


def stay_rid(stay: dict) -> str:
    return f"{float(stay['t_start']):.0f}"


def fold(vault, policy, now: float | None = None) -> FoldReport:
    """Fold the buffered fixes into stays and drop what may not stay (see module docstring).

    Parameters
    ----------
    vault : agent.vault.Vault
        Open vault; the caller normally holds a transaction.
    policy : agent.policy.Policy
        Uses ``codebook.stay_radius_m``, ``codebook.stay_min_minutes`` and
        ``retention.gps_buffer_minutes``.
    now : float, optional
        The clock (Unix seconds).  When given, the horizon is
        ``max(newest fix, now) - gps_buffer_minutes``, so exact fixes do not
        stay while no newer fix arrives (:func:`prune`); without it, the
        horizon is relative to the newest fix (what folding a new file uses,
        so the stays never depend on when a file was processed).
    """
    from .staypoints import extract_stays

    radius_m = float(policy.codebook.stay_radius_m)
    min_minutes = float(policy.codebook.stay_min_minutes)
    horizon_s = float(policy.retention.gps_buffer_minutes) * 60.0
    with vault.transaction():
        buffered = sorted(vault.items(FIXES), key=lambda rf: (float(rf[1]["t"]), rf[0]))
        rep = FoldReport(fixes_before=len(buffered))
        if not buffered:
            return rep
        newest = float(buffered[-1][1]["t"])
        cutoff = (newest if now is None else max(newest, float(now))) - horizon_s
        fixes = [dict(obj) for _, obj in buffered]
        stays, leftover = extract_stays(fixes, radius_m, min_minutes)
        left_ids = {id(f) for f in leftover}  # extract_stays returns the open segment's own dicts
        old_open = [f for f in leftover if float(f["t"]) < cutoff]
        if old_open:
            # The horizon cuts an unfinished dwell: close what lies before it.
            more, _ = extract_stays(old_open, radius_m, min_minutes, flush=True)
            stays = list(stays) + list(more)
        for s in stays:
            if vault.put(STAYS, stay_rid(s), _stay_payload(s)):
                rep.stays_new += 1
        drop = [rid for (rid, _), f in zip(buffered, fixes, strict=False)
                if id(f) not in left_ids or float(f["t"]) < cutoff]
        if drop:
            rep.fixes_deleted = vault.delete_many(FIXES, drop)
        rep.fixes_left = rep.fixes_before - rep.fixes_deleted
    return rep


def _stay_payload(s) -> dict:
    if isinstance(s, dict):
        return {"t_start": float(s["t_start"]), "t_end": float(s["t_end"]), "lat": float(s["lat"]),
                "lon": float(s["lon"]), "n": int(s.get("n", 0))}
    return {k: getattr(s, k) for k in ("t_start", "t_end", "lat", "lon", "n")}


def prune(vault, policy, now: float | None = None) -> FoldReport:
    """Fold and drop fixes older than ``gps_buffer_minutes`` before *the clock* (one transaction).

    The agent runs this at start and every ``gps_buffer_minutes / 4`` while
    watching, so exact coordinates never outlive the buffer because no newer
    fix arrived.  A dwell still open at the horizon is closed there first.
    """
    import time

    with vault.transaction():
        return fold(vault, policy, now=time.time() if now is None else float(now))
