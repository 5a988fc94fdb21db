"""GPS through the pipeline: fixes buffered encrypted, folded into stays, raw coordinates dropped."""

from __future__ import annotations

import pytest

from intake_samples import T0, drop, gps_csv_bytes, stamp

HOME_LAT, HOME_LON = 38.53, -28.63      # a fictional dwell location
AWAY_LAT, AWAY_LON = 38.56, -28.60      # about 4 km away


def _drain(h):
    from agent.intake.pipeline import drain

    return drain(h, h.load_policy(), settle_s=0.0)


def _fixes(h):
    from agent.vault import Vault

    with Vault.open(h) as v:
        return [obj for _, obj in v.items("gps_fixes")], [obj for _, obj in v.items("stays")]


def test_open_dwell_stays_buffered(h):
    drop(h.inbox, f"loc_{stamp(T0)}.gps.csv", gps_csv_bytes(T0, n=12, step_s=300))
    _drain(h)
    fixes, stays = _fixes(h)
    assert stays == [] and len(fixes) == 12  # not left yet: the dwell may go on


def test_leaving_closes_the_stay_and_drops_its_fixes(h):
    from geographiclib.geodesic import Geodesic

    drop(h.inbox, f"a_{stamp(T0)}.gps.csv", gps_csv_bytes(T0, n=12, step_s=300, lat=HOME_LAT, lon=HOME_LON))
    _drain(h)
    t1 = T0 + 12 * 300
    drop(h.inbox, f"b_{stamp(t1)}.gps.csv", gps_csv_bytes(t1, n=3, step_s=300, lat=AWAY_LAT, lon=AWAY_LON))
    _drain(h)
    fixes, stays = _fixes(h)
    assert len(stays) == 1
    s = stays[0]
    assert s["t_start"] == pytest.approx(T0) and s["n"] == 12
    # The stay's centre lies within D of the dwell location: geodesic distance on
    # WGS84 from geographiclib (Karney 2013).
    d = Geodesic.WGS84.Inverse(HOME_LAT, HOME_LON, s["lat"], s["lon"])["s12"]
    assert d < h.load_policy().codebook.stay_radius_m
    # Only the open segment away from home is still buffered.
    assert len(fixes) == 3
    assert all(f["t"] >= t1 for f in fixes)


def test_fixes_beyond_the_buffer_horizon_are_dropped(h):
    # 40 fixes 5 min apart at one place: 195 min > gps_buffer_minutes = 120.
    drop(h.inbox, f"long_{stamp(T0)}.gps.csv", gps_csv_bytes(T0, n=40, step_s=300))
    _drain(h)
    fixes, stays = _fixes(h)
    horizon = h.load_policy().retention.gps_buffer_minutes * 60
    newest = T0 + 39 * 300
    assert fixes and all(f["t"] >= newest - horizon for f in fixes)
    # The part of the dwell before the horizon was closed as a stay, not lost.
    assert len(stays) == 1 and stays[0]["t_start"] == pytest.approx(T0)


def test_same_gps_file_twice_adds_nothing(h):
    data = gps_csv_bytes(T0, n=40, step_s=300)
    drop(h.inbox, f"a_{stamp(T0)}.gps.csv", data)
    _drain(h)
    before = _fixes(h)
    drop(h.inbox, f"again_{stamp(T0)}.gps.csv", data)
    rep = _drain(h)
    assert rep.rows == 0 and rep.duplicate == {"gps": 1}
    assert _fixes(h) == before


def test_failed_fold_rolls_back_fixes_and_stays(h, monkeypatch):
    from agent.intake import gpsbuffer
    from agent.vault import Vault

    def boom(vault, policy):
        vault.put("stays", "x", {"t_start": 0})
        raise RuntimeError("disk trouble")

    monkeypatch.setattr(gpsbuffer, "fold", boom)
    drop(h.inbox, f"a_{stamp(T0)}.gps.csv", gps_csv_bytes(T0))
    rep = _drain(h)
    assert rep.reasons == {"store_failed": 1}
    assert list(h.inbox.iterdir()) == []  # still destroyed within the window
    with Vault.open(h) as v:
        assert v.count("gps_fixes") == v.count("stays") == v.count("intake_items") == 0


def test_exact_fixes_are_pruned_by_the_clock_without_a_newer_fix(h):
    """Low finding: fixes stayed while no newer fix arrived (the horizon was relative to the newest fix)."""
    import time

    from agent.intake.pipeline import Intake
    from agent.vault import Vault

    policy = h.load_policy()
    horizon_s = policy.retention.gps_buffer_minutes * 60
    t_old = time.time() - horizon_s - 3600          # all fixes older than the buffer, by the clock
    drop(h.inbox, f"loc_{stamp(t_old)}.gps.csv", gps_csv_bytes(t_old, n=4, step_s=60.0))
    with Intake(h, policy) as it:
        it.process_many([f"loc_{stamp(t_old)}.gps.csv"])
        with Vault.open(h) as v:
            assert v.count("gps_fixes") == 4       # folding relative to the newest fix keeps them
        assert it.gps_buffered
        rep = it.prune_gps()
        assert rep.fixes_deleted == 4 and not it.gps_buffered
    with Vault.open(h) as v:
        assert v.count("gps_fixes") == 0
