"""Audio features and levels, checked against standards and against librosa."""

from __future__ import annotations

import numpy as np
import pytest

from agent.intake import features as F

SR = 16000


def tone(freq, amp=1.0, seconds=3.0, sr=SR):
    t = np.arange(int(seconds * sr)) / sr
    return (amp * np.sin(2 * np.pi * freq * t)).astype(np.float32)


# IEC 61672-1, table of frequency weightings (A column), from memory.
@pytest.mark.parametrize("freq, expected_db", [(100.0, -19.1), (1000.0, 0.0), (10000.0, -2.5)])
def test_a_weighting_curve_matches_iec_61672_table(freq, expected_db):
    assert F.a_weighting_db(freq) == pytest.approx(expected_db, abs=0.1)


# IEC 61672-1, the A-weighting column of its table of frequency weightings at the
# one-third-octave frequencies 10 Hz - 20 kHz, in dB, from memory.  The standard's
# frequencies are the exact base-ten ones, f = 1000 * 10**(k / 10) Hz (IEC 61260-1), and
# its values are rounded to 0.1 dB, so the closed form must agree within about 0.05 dB.
IEC_61672_A_DB = (-70.4, -63.4, -56.7, -50.5, -44.7, -39.4, -34.6, -30.2, -26.2, -22.5,
                  -19.1, -16.1, -13.4, -10.9, -8.6, -6.6, -4.8, -3.2, -1.9, -0.8,
                  0.0, 0.6, 1.0, 1.2, 1.3, 1.2, 1.0, 0.5, -0.1, -1.1,
                  -2.5, -4.3, -6.6, -9.3)


@pytest.mark.parametrize("k, expected_db", list(enumerate(IEC_61672_A_DB, start=-20)))
def test_a_weighting_equals_the_iec_61672_table_at_every_third_octave(k, expected_db):
    f_hz = 1000.0 * 10.0 ** (k / 10.0)
    assert F.a_weighting_db(f_hz) == pytest.approx(expected_db, abs=0.06)


def test_a_weighting_formula_equals_the_analogue_network_evaluated_by_scipy():
    # The same IEC 61672-1 poles as a zero-pole-gain network (four zeros at
    # 0 Hz, double poles at f1 and f4, single at f2 and f3), evaluated by
    # scipy.signal.freqs_zpk and normalised to 0 dB at 1 kHz.
    from scipy.signal import freqs_zpk

    w = 2 * np.pi
    poles = [-w * F.A_F1] * 2 + [-w * F.A_F2, -w * F.A_F3] + [-w * F.A_F4] * 2
    f = np.array([31.5, 100.0, 500.0, 1000.0, 4000.0, 10000.0, 16000.0])
    _, h = freqs_zpk([0, 0, 0, 0], poles, 1.0, worN=w * f)
    _, h1k = freqs_zpk([0, 0, 0, 0], poles, 1.0, worN=[w * 1000.0])
    ref = 20 * np.log10(np.abs(h) / np.abs(h1k[0]))
    assert np.allclose(F.a_weighting_db(f), ref, atol=0.01)


def test_full_scale_sine_reads_0_dbfs():
    # AES17: the RMS of a full-scale sine is defined as 0 dBFS.
    assert F.level_dbfs(tone(1000.0, amp=1.0)) == pytest.approx(0.0, abs=0.01)


def test_half_scale_sine_reads_minus_6_02_dbfs():
    # AES17 convention; 20 log10(0.5) = -6.02 dB.
    assert F.level_dbfs(tone(1000.0, amp=0.5)) == pytest.approx(-6.02, abs=0.01)


def test_a_weighted_level_of_1khz_full_scale_sine_is_0_db():
    # A(1 kHz) = 0 dB by definition (IEC 61672-1), AES17 full-scale reference.
    assert F.level_dba(tone(1000.0), SR) == pytest.approx(0.0, abs=0.05)


def test_a_weighted_level_of_100hz_sine_is_attenuated_as_the_table_says():
    # IEC 61672-1 table, from memory: A(100 Hz) = -19.1 dB.
    assert F.level_dba(tone(100.0), SR) == pytest.approx(-19.1, abs=0.1)


def test_a_weighted_level_of_10khz_sine_is_attenuated_as_the_table_says():
    # IEC 61672-1 table, from memory: A(10 kHz) = -2.5 dB.  At 48 kHz so the
    # tone lies below the Nyquist frequency (at 16 kHz it would alias to 6 kHz).
    assert F.level_dba(tone(10000.0, sr=48000), 48000) == pytest.approx(-2.5, abs=0.1)


@pytest.mark.parametrize("freq", [1000.0, 2200.0, 3517.0])
def test_spectral_centroid_of_a_pure_tone_is_its_frequency(freq):
    # Definition: the magnitude-weighted mean frequency; a tone concentrates
    # all magnitude around its frequency (Hann leakage is symmetric).
    v = F.audio_vector(tone(freq, amp=0.5), SR)
    i = F.AUDIO_FEATURE_NAMES.index("centroid_hz")
    assert v[i] == pytest.approx(freq, rel=0.01)


def test_zero_crossing_rate_of_a_tone_is_twice_its_frequency_over_sr():
    # Definition: a sine crosses zero twice per period.  Interior frames only:
    # the edge-padded first and last frames hold a constant stretch.
    # A phase offset keeps samples off the exact zeros, where float rounding
    # would decide the sign.
    n_fft, hop = F.frame_params(SR)
    t = np.arange(3 * SR) / SR
    y = (0.5 * np.sin(2 * np.pi * 500.0 * t + 0.3)).astype(np.float32)
    z = F.zero_crossing_rate(y, n_fft, hop)
    assert np.median(z[2:-2]) == pytest.approx(2 * 500.0 / SR, rel=0.02)


def test_flatness_separates_white_noise_from_a_tone():
    # Definition (Wiener entropy): near 1 for white noise, near 0 for a tone.
    rng = np.random.default_rng(0)
    noise = (0.1 * rng.standard_normal(3 * SR)).astype(np.float32)
    i = F.AUDIO_FEATURE_NAMES.index("flatness")
    assert F.audio_vector(noise, SR)[i] > 0.4
    assert F.audio_vector(tone(1000.0, 0.5), SR)[i] < 0.01


@pytest.fixture(scope="module")
def signal():
    rng = np.random.default_rng(3)
    t = np.arange(3 * SR) / SR
    y = 0.05 * rng.standard_normal(t.size) + 0.2 * np.sin(2 * np.pi * 440 * t) * (t > 1)
    return y.astype(np.float32)


def _librosa_kwargs():
    n_fft, hop = F.frame_params(SR)
    return dict(n_fft=n_fft, hop_length=hop)


def test_stft_magnitude_matches_librosa(signal):
    # Reference implementation: librosa.stft (Hann, centred, constant padding).
    import librosa

    ref = np.abs(librosa.stft(signal, **_librosa_kwargs()))
    got = F.stft_magnitude(signal, **_librosa_kwargs())
    assert got.shape == ref.shape
    assert np.allclose(got, ref, atol=1e-5 * ref.max())


def test_mfcc_mean_and_sd_match_librosa(signal):
    # Reference implementation: librosa.feature.mfcc with the same framing.
    import librosa

    ref = librosa.feature.mfcc(y=signal, sr=SR, n_mfcc=F.N_MFCC, n_mels=F.N_MELS, **_librosa_kwargs())
    v = F.audio_vector(signal, SR)
    assert np.allclose(v[:20], ref.mean(axis=1), atol=1e-3)
    assert np.allclose(v[20:40], ref.std(axis=1), atol=1e-3)


@pytest.mark.parametrize("name, func", [
    ("centroid_hz", "spectral_centroid"),
    ("flatness", "spectral_flatness"),
    ("rolloff_hz", "spectral_rolloff"),
    ("zcr", "zero_crossing_rate"),
])
def test_spectral_summaries_match_librosa(signal, name, func):
    # Reference implementation: the librosa.feature function of the same name.
    import librosa

    kw = _librosa_kwargs()
    if func == "zero_crossing_rate":
        ref = librosa.feature.zero_crossing_rate(signal, frame_length=kw["n_fft"], hop_length=kw["hop_length"])
    elif func == "spectral_flatness":
        ref = librosa.feature.spectral_flatness(y=signal, **kw)
    else:
        ref = getattr(librosa.feature, func)(y=signal, sr=SR, **kw)
    v = F.audio_vector(signal, SR)
    assert v[F.AUDIO_FEATURE_NAMES.index(name)] == pytest.approx(float(ref.mean()), rel=1e-4)


def test_log_mel_bands_are_means_of_groups_of_the_librosa_log_mel(signal):
    # Reference implementation: librosa.feature.melspectrogram + power_to_db(top_db=80).
    import librosa

    mel = librosa.feature.melspectrogram(y=signal, sr=SR, n_mels=F.N_MELS, **_librosa_kwargs())
    db = librosa.power_to_db(mel, ref=1.0, amin=1e-10, top_db=80.0)
    ref = db.reshape(F.N_MEL_BANDS, -1, db.shape[1]).mean(axis=(1, 2))
    v = F.audio_vector(signal, SR)
    i = F.AUDIO_FEATURE_NAMES.index("logmel_band1_db")
    assert np.allclose(v[i:i + F.N_MEL_BANDS], ref, atol=1e-3)


def test_feature_vector_has_one_value_per_name(signal):
    v = F.audio_vector(signal, SR)
    assert len(F.AUDIO_FEATURE_NAMES) == 52
    assert v.shape == (len(F.AUDIO_FEATURE_NAMES),)
    assert np.isfinite(v).all()


def test_frame_parameters_scale_with_sample_rate():
    assert F.frame_params(16000) == (512, 256)
    assert F.frame_params(48000) == (2048, 1024)


def test_warm_up_fills_the_caches_the_first_snippet_needs(default_policy):
    F._mel_basis.cache_clear()
    F._a_weight_power.cache_clear()
    assert F.warm_up(default_policy) > 0.0
    assert F._mel_basis.cache_info().currsize == 1
    assert F._a_weight_power.cache_info().currsize == 1


@pytest.mark.parametrize("sr", [8000, 16000, 22050, 48000])
def test_mel_filterbank_matches_librosa(sr):
    # Reference implementation: librosa.filters.mel (Slaney scale and norm).
    import librosa

    n_fft, _ = F.frame_params(sr)
    ref = librosa.filters.mel(sr=sr, n_fft=n_fft, n_mels=F.N_MELS)
    assert np.allclose(F.mel_filterbank(sr, n_fft), ref, atol=1e-7)


def test_slaney_mel_scale_puts_1khz_at_15_mels():
    # Slaney's Auditory Toolbox scale: linear to 1 kHz at 200/3 Hz per mel.
    assert F.hz_to_mel(1000.0) == pytest.approx(15.0)
    assert F.mel_to_hz(F.hz_to_mel([200.0, 4000.0])) == pytest.approx([200.0, 4000.0])


def test_featurise_does_not_import_librosa_or_numba():
    # Start-up matters for a background agent: the hot path is numpy/scipy.fft.
    import subprocess
    import sys

    code = ("import io, sys, numpy as np, soundfile as sf\n"
            "from agent.policy import load_policy, bundled_policy_path\n"
            "from agent.intake import featurise\n"
            "b = io.BytesIO(); t = np.arange(132300) / 44100\n"
            "sf.write(b, (0.2 * np.sin(2 * np.pi * 440 * t)).astype('float32'), 44100, format='WAV')\n"
            "featurise('snd_20261104T120000Z.wav', b.getvalue(), load_policy(bundled_policy_path()))\n"
            "print('librosa' in sys.modules, 'numba' in sys.modules)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.split() == ["False", "False"]


@pytest.mark.parametrize("n, sr", [(48000, 16000), (48001, 16000), (1000, 8000), (300, 16000), (144000, 48000)])
def test_one_pass_zero_crossing_mean_equals_the_framed_mean(n, sr):
    # The framed rate is checked against librosa above; the one-pass mean must equal its mean.
    rng = np.random.default_rng(n)
    y = rng.standard_normal(n).astype(np.float32)
    y[::7] = 0.0                      # exact zeros read as positive
    y[5::11] = np.float32(-1e-12)     # within 1e-10 of zero: also positive
    n_fft, hop = F.frame_params(sr)
    framed = F.zero_crossing_rate(y, n_fft, hop).mean()
    assert F.zero_crossing_rate_mean(y, n_fft, hop) == pytest.approx(framed, rel=1e-12)


def test_a_weighted_level_of_50hz_sine_is_attenuated_as_the_table_says():
    # IEC 61672-1 table: A(50 Hz) = -30.2 dB (from memory).  Spectrogram bins of
    # 31 Hz would read this tone 2.4 dB too loud; the snippet's own spectrum does not.
    assert F.level_dba(tone(50.0), SR) == pytest.approx(-30.2, abs=0.1)


def test_work_arrays_carry_nothing_from_one_snippet_to_the_next():
    # audio_vector and level_dba reuse per-thread work arrays; a snippet's values must
    # not depend on what was computed before it (same length or not).
    rng = np.random.default_rng(7)
    a = (0.3 * rng.standard_normal(48000)).astype(np.float32)
    b = tone(3000.0, amp=0.5)
    c = (0.1 * rng.standard_normal(40000)).astype(np.float32)
    first = F.audio_vector(a, SR), F.level_dba(a, SR)
    for other in (b, c):
        F.audio_vector(other, SR)
        F.level_dba(other, SR)
        again = F.audio_vector(a, SR), F.level_dba(a, SR)
        assert np.array_equal(again[0], first[0]) and again[1] == first[1]


def test_work_arrays_are_per_thread():
    # Two threads featurising different snippets at once give each its serial result.
    from concurrent.futures import ThreadPoolExecutor

    rng = np.random.default_rng(8)
    sigs = [(0.2 * rng.standard_normal(48000)).astype(np.float32) for _ in range(8)]
    serial = [F.audio_vector(s, SR) for s in sigs]
    with ThreadPoolExecutor(max_workers=2) as ex:
        for _ in range(5):
            for got, want in zip(ex.map(lambda s: F.audio_vector(s, SR), sigs), serial, strict=True):
                assert np.array_equal(got, want)


def test_stft_magnitude_is_not_a_work_array():
    # The public spectrogram is the caller's to keep: a later call must not overwrite it.
    y = tone(440.0)
    s1 = F.stft_magnitude(y, 512, 256)
    kept = s1.copy()
    F.stft_magnitude(tone(2000.0), 512, 256)
    F.audio_vector(tone(2000.0), SR)
    assert np.array_equal(s1, kept)


def test_no_signal_or_spectrum_stays_in_the_work_arrays():
    # docs/features.md, "Discarded": the decoded signal and the spectrogram are dropped
    # once the features exist; the reused work arrays are zeroed.
    y = tone(440.0, amp=0.5)
    F.audio_vector(y, SR)
    F.level_dba(y, SR)
    arrays = F._WORK.arrays
    assert {"stft_padded", "stft_windowed", "stft_magnitude", "power"} <= set(arrays)
    assert all(not a.any() for a in arrays.values())
