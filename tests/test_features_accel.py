"""Accelerometry window features: ENMO, magnitude SD, dominant frequency, active flag."""

from __future__ import annotations

import numpy as np
import pytest

from agent.intake import features as F
from agent.intake.readers.accel import STANDARD_GRAVITY

RATE = 10.0


def still(n=600, tilt=(0.0, 0.0, 1.0)):
    t = 1793800800.0 + np.arange(n) / RATE
    xyz = np.tile(np.asarray(tilt, dtype=float), (n, 1))
    return t, xyz


def gait(freq=2.0, n=600, amp=0.3, rate=RATE):
    t = 1793800800.0 + np.arange(n) / rate
    z = 1.0 + amp * np.sin(2 * np.pi * freq * (t - t[0]))
    return t, np.column_stack([np.zeros(n), np.zeros(n), z])


def test_enmo_of_a_still_device_is_zero():
    # Common practice, no source: at rest the sensor reads exactly 1 g.
    t, xyz = still()
    rows, _ = F.accel_windows(t, xyz, RATE, 10.0)
    assert [r[1] for r in rows] == [0.0] * 6


def test_enmo_of_a_still_tilted_device_is_zero():
    # Common practice, no source: orientation does not matter, only |a| = 1 g.
    t, xyz = still(tilt=(np.sin(0.4), 0.0, np.cos(0.4)))
    rows, _ = F.accel_windows(t, xyz, RATE, 10.0)
    assert max(r[1] for r in rows) == pytest.approx(0.0, abs=1e-12)


def test_enmo_sets_negative_values_to_zero():
    # van Hees et al. 2013: ENMO = max(||a|| - 1 g, 0).
    xyz = np.array([[0.0, 0.0, 0.5], [0.0, 0.0, 1.5], [0.6, 0.0, 0.8]])
    assert np.allclose(F.enmo_g(xyz), [0.0, 0.5, 0.0])


def test_dominant_frequency_of_a_2hz_gait_signal_is_2hz():
    # Common practice, no source: walking cadence about 2 steps per second.
    t, xyz = gait(2.0)
    rows, _ = F.accel_windows(t, xyz, RATE, 10.0)
    assert [r[3] for r in rows] == pytest.approx([2.0] * 6, abs=0.2)


def test_dominant_frequency_at_a_higher_rate():
    t, xyz = gait(1.6, n=3000, rate=50.0)
    rows, _ = F.accel_windows(t, xyz, 50.0, 10.0)
    assert np.median([r[3] for r in rows]) == pytest.approx(1.6, abs=0.2)


def test_still_window_has_no_dominant_frequency():
    t, xyz = still()
    rows, _ = F.accel_windows(t, xyz, RATE, 10.0)
    assert {r[3] for r in rows} == {0.0}


def test_magnitude_sd_of_a_sine_is_amplitude_over_root_two():
    # Definition: the SD of A sin(.) over whole periods is A / sqrt(2).
    t, xyz = gait(2.0, amp=0.3)
    rows, _ = F.accel_windows(t, xyz, RATE, 10.0)
    assert rows[0][2] == pytest.approx(0.3 / np.sqrt(2), rel=0.02)


def test_active_flag_uses_the_documented_cut_point():
    t, xyz = gait(2.0, amp=0.3)
    rows, _ = F.accel_windows(t, xyz, RATE, 10.0)
    assert all(r[4] == 1 for r in rows)            # ENMO = 0.3/pi = 0.095 g >= 0.0448 g
    t, xyz = still()
    rows, _ = F.accel_windows(t, xyz, RATE, 10.0)
    assert all(r[4] == 0 for r in rows)


def test_windows_start_at_the_first_sample_and_step_by_window_s():
    t, xyz = still()
    rows, skipped = F.accel_windows(t, xyz, RATE, 10.0)
    assert [r[0] - t[0] for r in rows] == pytest.approx([0, 10, 20, 30, 40, 50])
    assert skipped == 0


def test_a_short_trailing_window_is_skipped_and_counted():
    t, xyz = still(n=630)    # 63 s: the last 3 s window holds 30 % of its samples
    rows, skipped = F.accel_windows(t, xyz, RATE, 10.0)
    assert len(rows) == 6 and skipped == 1


def test_standard_gravity_is_the_cgpm_value():
    # 3rd CGPM (1901): g_n = 9.80665 m/s^2 exactly.
    assert STANDARD_GRAVITY == 9.80665


def test_active_flag_switches_at_the_cut_point():
    # A constant 1 g + c magnitude has ENMO c (up to rounding).
    t = 1793800800.0 + np.arange(200) / RATE
    for c, want in ((F.ACTIVE_ENMO_G + 1e-6, 1), (F.ACTIVE_ENMO_G - 1e-4, 0)):
        xyz = np.column_stack([np.zeros(200), np.zeros(200), np.full(200, 1.0 + c)])
        rows, _ = F.accel_windows(t, xyz, RATE, 10.0)
        assert {r[4] for r in rows} == {want}


def test_active_fraction_is_the_share_of_active_windows(default_policy):
    from agent.intake.readers.accel import AccelRecord

    t, xyz = gait(2.0, n=600)
    xyz[:300] = [0.0, 0.0, 1.0]                      # first 30 s still, last 30 s walking
    rec = AccelRecord(path="b.accel.csv", t=t, xyz_g=xyz, rate_hz=RATE)
    payload = F.accel_features(rec, default_policy).rows["accel_features"][0][1]
    assert payload["active_fraction"] == 0.5


@pytest.mark.parametrize("n, nperseg", [(100, 50), (100, 100), (97, 33), (600, 64)])
def test_welch_psd_matches_scipy(n, nperseg):
    # Reference implementation: scipy.signal.welch (Hann, 50 % overlap,
    # constant detrend, density scaling, mean average).
    from scipy.signal import welch

    x = np.random.default_rng(n).standard_normal((3, n))
    f_ref, p_ref = welch(x, fs=10.0, nperseg=nperseg, noverlap=nperseg // 2, axis=-1)
    f, p = F.welch_psd(x, 10.0, nperseg)
    assert np.allclose(f, f_ref) and np.allclose(p, p_ref)


def test_batched_windows_equal_window_by_window_computation():
    # A gap inside the third window makes equal-length windows non-contiguous.
    t, xyz = gait(1.8, n=600)
    keep = np.ones(600, dtype=bool)
    keep[230:260] = False
    t, xyz = t[keep], xyz[keep]
    rows, _ = F.accel_windows(t, xyz, RATE, 10.0)
    mag = np.linalg.norm(xyz, axis=1)
    for r in rows:
        sel = (t >= r[0]) & (t < r[0] + 10.0)
        assert r[1] == pytest.approx(F.enmo_g(xyz[sel]).mean())
        assert r[2] == pytest.approx(mag[sel].std())
        assert r[3] == pytest.approx(F.dominant_hz(mag[sel][None, :], RATE)[0])


def _windows_by_definition(t, xyz, rate, window_s):
    """Window by window, as docs/features.md defines them (floor of the offset over window_s)."""
    k = np.floor((t - t[0]) / window_s).astype(int)
    mag = np.linalg.norm(xyz, axis=1)
    rows = []
    for w in range(k[-1] + 1):
        sel = k == w
        if sel.sum() >= 0.5 * rate * window_s:
            rows.append([t[0] + w * window_s, F.enmo_g(xyz[sel]).mean(), mag[sel].std()])
    return rows, k[-1] + 1 - len(rows)


@pytest.mark.parametrize("gap_s", [25.0, 86400.0])
def test_windows_across_a_gap_equal_the_definition(gap_s):
    # Two 60 s runs of walking, a gap between them: a day's gap is 8,640 empty windows,
    # counted as skipped without a per-window array over the day.
    t1, xyz1 = gait(1.8, n=600)
    t2, xyz2 = gait(2.2, n=600)
    t = np.concatenate([t1, t2 + 60.0 + gap_s])
    xyz = np.vstack([xyz1, xyz2])
    rows, skipped = F.accel_windows(t, xyz, RATE, 10.0)
    want, want_skipped = _windows_by_definition(t, xyz, RATE, 10.0)
    assert skipped == want_skipped and len(rows) == len(want)
    assert np.allclose(np.array(rows)[:, :3], np.array(want), rtol=1e-12, atol=1e-12)


def test_full_windows_equal_the_definition():
    # The reshape path (every window full, one length) against the window-by-window definition.
    t, xyz = gait(1.3, n=900)
    xyz[:, 0] += 0.2 * np.cos(2 * np.pi * 0.7 * (t - t[0]))
    rows, skipped = F.accel_windows(t, xyz, RATE, 10.0)
    want, _ = _windows_by_definition(t, xyz, RATE, 10.0)
    assert skipped == 0 and np.allclose(np.array(rows)[:, :3], np.array(want), rtol=1e-12, atol=1e-12)
    mag = np.linalg.norm(xyz, axis=1).reshape(9, 100)
    assert [r[3] for r in rows] == pytest.approx(F.dominant_hz(mag, RATE).tolist())


@pytest.mark.parametrize("n, rate", [(100, 10.0), (97, 10.0), (250, 25.0), (64, 12.5)])
def test_dominant_frequency_is_the_argmax_of_the_welch_estimate(n, rate):
    # dominant_hz skips the density scale (a positive factor); it must pick the bin
    # the scaled estimate (tested against scipy.signal.welch above) picks.
    x = 1.0 + 0.05 * np.random.default_rng(n).standard_normal((20, n))
    nperseg = min(n, max(4, int(round(F.WELCH_SEGMENT_S * rate))))
    f, p = F.welch_psd(x, rate, nperseg)
    assert F.dominant_hz(x, rate).tolist() == f[1:][np.argmax(p[:, 1:], axis=-1)].tolist()
