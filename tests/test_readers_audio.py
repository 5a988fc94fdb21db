"""Audio reader: decoding from bytes, resampling, and the validity checks."""

from __future__ import annotations

import io

import numpy as np
import pytest
import soundfile as sf

from agent.errors import RejectedInput
from agent.intake import featurise
from agent.intake.readers.audio import read_audio

T0 = 1793793600.0          # 2026-11-04T12:00:00Z
NAME = "snd_20261104T120000Z.wav"
NOW = T0 + 3600.0


def encode(y, sr, fmt="WAV", subtype=None):
    buf = io.BytesIO()
    sf.write(buf, y, sr, format=fmt, subtype=subtype)
    return buf.getvalue()


def tone(seconds=3.0, sr=16000, freq=440.0, amp=0.3, channels=1):
    t = np.arange(int(round(seconds * sr))) / sr
    y = (amp * np.sin(2 * np.pi * freq * t)).astype(np.float32)
    return np.column_stack([y] * channels) if channels > 1 else y


def rejected(name, data, policy):
    with pytest.raises(RejectedInput) as e:
        featurise(name, data, policy, now=NOW)
    return e.value


@pytest.mark.parametrize("fmt, suffix", [("WAV", ".wav"), ("FLAC", ".flac"), ("OGG", ".ogg")])
def test_each_container_is_read_from_bytes(default_policy, fmt, suffix):
    data = encode(tone(), 16000, fmt)
    r = featurise(NAME.replace(".wav", suffix), data, default_policy, now=NOW)
    (sfx, row), = r.rows["audio_features"]
    assert r.kind == "audio" and sfx == ""
    assert row["t"] == T0
    assert len(row["vec"]) == 52


def test_stereo_44k1_is_mixed_to_mono_and_resampled(default_policy):
    clip = read_audio(NAME, encode(tone(sr=44100, channels=2), 44100), default_policy, now=NOW)
    assert clip.sr == 16000 and clip.orig_sr == 44100 and clip.channels == 2
    assert clip.y.ndim == 1 and len(clip.y) == 48000


def test_resampling_preserves_a_tone_level_and_frequency(default_policy):
    # A 1 kHz half-scale sine at 48 kHz keeps -6.02 dBFS (AES17) and its
    # centroid after band-limited resampling to 16 kHz.
    from agent.intake.features import AUDIO_FEATURE_NAMES

    data = encode(tone(sr=48000, freq=1000.0, amp=0.5), 48000, subtype="FLOAT")
    row = featurise(NAME, data, default_policy, now=NOW).rows["audio_features"][0][1]
    assert row["dbfs"] == pytest.approx(-6.02, abs=0.05)
    assert row["vec"][AUDIO_FEATURE_NAMES.index("centroid_hz")] == pytest.approx(1000.0, rel=0.01)


def test_length_within_tolerance_is_accepted(default_policy):
    data = encode(tone(seconds=3.2), 16000)
    assert featurise(NAME, data, default_policy, now=NOW).n_samples == 51200


def test_too_long_is_wrong_length(default_policy):
    assert rejected(NAME, encode(tone(seconds=4.0), 16000), default_policy).reason == "wrong_length"


def test_much_too_long_compressed_file_is_refused_without_decoding_it_all(default_policy):
    # A minute of a faint tone compresses to little; the reader stops after ~3.25 s.
    assert rejected(NAME.replace(".wav", ".flac"), encode(tone(seconds=60.0, amp=0.0001), 16000, "FLAC"),
                    default_policy).reason == "wrong_length"


def test_truncated_flac_is_rejected(default_policy):
    data = encode(tone(), 16000, "FLAC")
    assert rejected(NAME.replace(".wav", ".flac"), data[: len(data) // 2], default_policy).reason == "truncated"


def test_truncated_ogg_is_rejected(default_policy):
    data = encode(tone(), 16000, "OGG")
    assert rejected(NAME.replace(".wav", ".ogg"), data[: len(data) // 2], default_policy).reason == "truncated"


def test_wav_with_unfinalised_header_is_truncated(default_policy):
    data = bytearray(encode(tone(), 16000))
    pos = data.find(b"data")
    data[pos + 4:pos + 8] = (0xFFFFFFFF).to_bytes(4, "little")
    assert rejected(NAME, bytes(data), default_policy).reason == "truncated"


def test_constant_dc_is_silent_corrupt(default_policy):
    y = np.full(48000, 0.25, dtype=np.float32)
    assert rejected(NAME, encode(y, 16000), default_policy).reason == "silent_corrupt"


def test_nan_samples_are_silent_corrupt(default_policy):
    y = tone()
    y[100] = np.nan
    assert rejected(NAME, encode(y, 16000, subtype="FLOAT"), default_policy).reason == "silent_corrupt"


# The checks read the extremes of the decoded samples (numpy's min and max propagate NaN);
# each case on stereo too, where the swing is the mono mix's.
@pytest.mark.parametrize("bad", [np.inf, -np.inf, np.nan])
def test_an_infinite_or_nan_sample_in_one_stereo_channel_is_silent_corrupt(default_policy, bad):
    y = tone(channels=2)
    y[4000, 1] = bad
    assert rejected(NAME, encode(y, 16000, subtype="FLOAT"), default_policy).reason == "silent_corrupt"


def test_stereo_channels_in_opposite_phase_mix_to_silence(default_policy):
    # Each channel swings +-0.3; their mean is zero: a constant signal after mixing.
    y = tone()
    data = encode(np.column_stack([y, -y]), 16000, subtype="FLOAT")
    assert rejected(NAME, data, default_policy).reason == "silent_corrupt"


def test_a_clipped_stereo_channel_is_counted(default_policy):
    y = tone(channels=2)
    y[:, 0] = np.clip(y[:, 0] * 10.0, -1.0, 1.0)
    r = featurise(NAME, encode(y, 16000), default_policy, now=NOW)
    assert any("clipped" in w for w in r.warnings)


def test_name_without_start_time_is_a_bad_timestamp(default_policy):
    assert rejected("snd.wav", encode(tone(), 16000), default_policy).reason == "bad_timestamp"


def test_start_time_before_2000_is_a_bad_timestamp(default_policy):
    assert rejected("snd_19991231T235959Z.wav", encode(tone(), 16000), default_policy).reason == "bad_timestamp"


def test_impossible_calendar_date_is_a_bad_timestamp(default_policy):
    assert rejected("snd_20261341T250000Z.wav", encode(tone(), 16000), default_policy).reason == "bad_timestamp"


def test_rejection_names_the_file_and_carries_no_content(default_policy):
    e = rejected(NAME, encode(tone(seconds=5.0), 16000), default_policy)
    assert NAME in str(e) and "wrong_length" in str(e)
    assert "Error opening" not in e.detail


def test_resampler_equals_librosa_soxr_hq():
    # Reference implementation: librosa.resample(res_type="soxr_hq").
    import librosa

    from agent.intake.readers.audio import RES_TYPE, resample

    y = np.random.default_rng(0).standard_normal(44100).astype(np.float32) * 0.1
    ref = librosa.resample(y, orig_sr=44100, target_sr=16000, res_type=RES_TYPE)
    assert np.allclose(resample(y, 44100, 16000), ref, atol=1e-6)


def test_aiff_named_wav_is_not_audio_for_this_study(default_policy):
    # libsndfile could decode it, but only WAV, FLAC and Ogg are contracted.
    assert rejected(NAME, encode(tone(), 16000, "AIFF"), default_policy).reason == "not_audio"


def test_riff_that_is_not_wave_is_not_audio(default_policy):
    data = bytearray(encode(tone(), 16000))
    data[8:12] = b"AVI "
    assert rejected(NAME, bytes(data), default_policy).reason == "not_audio"


def test_wav_header_followed_by_garbage_is_truncated(default_policy):
    data = encode(tone(), 16000)[:12] + np.random.default_rng(1).bytes(4000)
    assert rejected(NAME, data, default_policy).reason == "truncated"


def test_implausible_sample_rate_is_a_bad_header(default_policy):
    assert rejected(NAME, encode(tone(sr=4000), 4000), default_policy).reason == "bad_header"


def test_clipped_recording_is_kept_with_a_warning(default_policy):
    y = np.clip(tone(amp=3.0), -1.0, 1.0)
    r = featurise(NAME, encode(y, 16000), default_policy, now=NOW)
    assert any("clipped" in w for w in r.warnings)
    assert featurise(NAME, encode(tone(), 16000), default_policy, now=NOW).warnings == []


@pytest.mark.parametrize("channels", [1, 2, 3, 7])
def test_mix_down_equals_numpy_mean_over_channels(channels):
    # Reference: numpy's y.mean(axis=1) in single precision, bit for bit.
    from agent.intake.readers.audio import _mix_down

    y = np.random.default_rng(channels).uniform(-1, 1, (4410, channels)).astype(np.float32)
    assert np.array_equal(_mix_down(y), y.mean(axis=1))


def test_mix_down_of_eight_channels_is_the_mean_to_float32_rounding():
    # numpy sums 8 values in pairs; sequential addition may differ in the last bit.
    from agent.intake.readers.audio import _mix_down

    y = np.random.default_rng(8).uniform(-1, 1, (4410, 8)).astype(np.float32)
    assert np.allclose(_mix_down(y), y.mean(axis=1), rtol=0, atol=4 * np.finfo(np.float32).eps)
