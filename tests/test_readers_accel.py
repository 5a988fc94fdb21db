"""Accelerometry reader: unit line, header, vectorised parse, rate and gap checks."""

from __future__ import annotations

import io

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.errors import RejectedInput
from agent.intake import featurise
from agent.intake.readers.accel import PLAIN_MIN_BYTES, STANDARD_GRAVITY, read_accel, read_accel_wav

T0 = 1793793600.0
NOW = T0 + 3600.0
NAME = "burst_20261104T120000Z.accel.csv"


def accel(n=600, rate=10.0, unit="g", scale=1.0, unit_line=None, header="time,x,y,z", t=None,
          z=1.0):
    t = T0 + np.arange(n) / rate if t is None else t
    rows = "\n".join(f"{a:.3f},{0.01 * scale:.5f},{-0.02 * scale:.5f},{z * scale:.5f}" for a in t)
    first = unit_line if unit_line is not None else f"# unit={unit} rate_hz={rate:g}"
    return f"{first}\n{header}\n{rows}\n".encode()


def reason(data, policy, name=NAME):
    with pytest.raises(RejectedInput) as e:
        featurise(name, data, policy, now=NOW)
    return e.value.reason


def test_g_file_gives_six_windows(default_policy):
    r = featurise(NAME, accel(), default_policy, now=NOW)
    (sfx, row), = r.rows["accel_features"]
    assert r.kind == "accel" and sfx == "" and r.n_samples == 600
    assert row["t0"] == T0 and row["window_s"] == 10.0 and len(row["windows"]) == 6
    assert row["active_fraction"] == 0.0


def test_m_per_s2_is_converted_with_standard_gravity(default_policy):
    # 3rd CGPM (1901): 1 g = 9.80665 m/s^2.
    a = read_accel(NAME, accel(unit="g"), default_policy, now=NOW)
    b = read_accel(NAME, accel(unit="m/s^2", scale=STANDARD_GRAVITY), default_policy, now=NOW)
    assert np.allclose(a.xyz_g, b.xyz_g, atol=1e-5)


def test_unit_line_without_rate_is_accepted(default_policy):
    r = read_accel(NAME, accel(unit_line="# unit=g"), default_policy, now=NOW)
    assert r.rate_hz == pytest.approx(10.0)


def test_rate_within_tolerance_is_accepted(default_policy):
    # 10.5 Hz is within 10 Hz +- 10 %.
    data = accel(rate=10.5, unit_line="# unit=g")
    # Times carry milliseconds, so the measured rate is 10.5 Hz to within 1 %.
    assert read_accel(NAME, data, default_policy, now=NOW).rate_hz == pytest.approx(10.5, rel=0.01)


def test_declared_rate_outside_the_policy_is_bad_rate(default_policy):
    assert reason(accel(unit_line="# unit=g rate_hz=50"), default_policy) == "bad_rate"


def test_gap_is_reported_as_a_warning(default_policy):
    t = T0 + np.concatenate([np.arange(300), np.arange(350, 650)]) / 10.0
    r = featurise(NAME, accel(t=t), default_policy, now=NOW)
    assert r.dropped["gap"] == 1
    assert any("gap" in w for w in r.warnings)


def test_times_going_backwards_are_a_bad_timestamp(default_policy):
    t = T0 + np.arange(600) / 10.0
    t[300] = t[298]
    assert reason(accel(t=t), default_policy) == "bad_timestamp"


def test_non_numeric_value_is_bad_value_without_echoing_it(default_policy):
    data = accel().replace(b"\n1793793600.100,", b"\nsecret,")
    with pytest.raises(RejectedInput) as e:
        featurise(NAME, data, default_policy, now=NOW)
    assert e.value.reason == "bad_value" and "secret" not in str(e.value)


def test_nan_value_is_bad_value(default_policy):
    data = accel().replace(b"0.01000", b"nan", 1)
    assert reason(data, default_policy) == "bad_value"


def test_single_sample_is_too_short(default_policy):
    assert reason(accel(n=1), default_policy) == "too_short"


def test_gravity_free_values_labelled_g_are_bad_unit(default_policy):
    # A median magnitude of 0.02 g cannot be a sensor that senses gravity.
    assert reason(accel(z=0.0), default_policy) == "bad_unit"


def test_crlf_line_ends_and_a_byte_order_mark_are_accepted(default_policy):
    data = b"\xef\xbb\xbf" + accel().replace(b"\n", b"\r\n")
    assert read_accel(NAME, data, default_policy, now=NOW).t.shape == (600,)


def test_header_without_samples_is_too_short(default_policy):
    assert reason(b"# unit=g\ntime,x,y,z\n", default_policy) == "too_short"


def test_exponent_and_crlf_files_read_as_the_plain_file(default_policy):
    # The general parser (numpy.loadtxt) takes what the plain-decimal reader declines;
    # both give float()'s values, so the records are identical.  3,000 rows: a body
    # long enough for the plain reader.
    plain = accel(n=3000)
    assert len(plain) > PLAIN_MIN_BYTES
    crlf = plain.replace(b"\n", b"\r\n")
    head, body = plain.split(b"\n", 2)[:2], plain.split(b"\n", 2)[2]
    exp = b"\n".join(head) + b"\n" + body.replace(b",0.01000,", b",1.000e-2,")
    a = read_accel(NAME, plain, default_policy, now=NOW)
    for other in (crlf, exp):
        b = read_accel(NAME, other, default_policy, now=NOW)
        assert np.array_equal(a.t, b.t) and np.array_equal(a.xyz_g, b.xyz_g)


# -- the binary burst, *.accel.wav ------------------------------------------------------
WAV_NAME = "burst_20261104T120000Z.accel.wav"


def accel_wav(xyz, rate=10, subtype="FLOAT"):
    import io

    import soundfile as sf

    buf = io.BytesIO()
    sf.write(buf, np.asarray(xyz, dtype=np.float32), rate, format="WAV", subtype=subtype)
    return buf.getvalue()


def plain_float_wav(xyz, rate=10):
    """A WAV written by hand with the plain IEEE float tag (3), not the extensible header."""
    import struct

    pcm = np.asarray(xyz, dtype="<f4").tobytes()
    ch = np.asarray(xyz).shape[1]
    fmt = struct.pack("<HHIIHH", 3, ch, rate, rate * 4 * ch, 4 * ch, 32)
    body = b"WAVE" + b"fmt " + struct.pack("<I", len(fmt)) + fmt + b"data" + struct.pack("<I", len(pcm)) + pcm
    return b"RIFF" + struct.pack("<I", len(body)) + body


def _xyz(n=600):
    rng = np.random.default_rng(0)
    xyz = rng.normal(0.0, 0.05, (n, 3))
    xyz[:, 2] += 1.0
    return xyz.astype(np.float32)


def test_wav_suffix_is_accelerometry():
    from agent.intake import classify

    assert classify(WAV_NAME) == "accel" and classify("snd_20261104T120000Z.wav") == "audio"


def test_wav_burst_gives_the_windows_of_the_same_samples_in_csv(default_policy):
    xyz = _xyz()
    t = T0 + np.arange(len(xyz)) / 10.0
    csv = "# unit=g rate_hz=10\ntime,x,y,z\n" + "".join(
        f"{a:.1f},{x!r},{y!r},{z!r}\n" for a, (x, y, z) in zip(t, xyz.astype(float).tolist(), strict=True))
    a = featurise(NAME, csv.encode(), default_policy, now=NOW).rows["accel_features"][0][1]
    for data in (accel_wav(xyz), plain_float_wav(xyz)):
        b = featurise(WAV_NAME, data, default_policy, now=NOW).rows["accel_features"][0][1]
        assert b["t0"] == a["t0"] == T0
        wa, wb = np.array(a["windows"]), np.array(b["windows"])
        assert np.allclose(wb[:, [0, 1, 2, 4]], wa[:, [0, 1, 2, 4]], rtol=1e-12, atol=1e-12)
        # The CSV's rate is measured from times printed to 0.1 s (1 / median interval, a
        # few parts per million from 10 Hz); the WAV's is the header's 10 Hz exactly.
        assert np.allclose(wb[:, 3], wa[:, 3], rtol=1e-5)


def test_wav_burst_times_follow_the_header_rate(default_policy):
    r = read_accel_wav(WAV_NAME, accel_wav(_xyz(), rate=10), default_policy, now=NOW)
    assert r.rate_hz == 10.0 and r.t[0] == T0 and r.t[-1] == pytest.approx(T0 + 59.9)


def test_wav_burst_of_16_bit_pcm_is_a_bad_header(default_policy):
    assert reason(accel_wav(_xyz(), subtype="PCM_16"), default_policy, name=WAV_NAME) == "bad_header"


def test_wav_burst_with_two_channels_is_a_bad_header(default_policy):
    assert reason(accel_wav(_xyz()[:, :2]), default_policy, name=WAV_NAME) == "bad_header"


def test_wav_burst_that_is_not_riff_is_a_bad_header(default_policy):
    assert reason(b"OggS" + bytes(100), default_policy, name=WAV_NAME) == "bad_header"


def test_wav_burst_cut_short_is_truncated(default_policy):
    data = plain_float_wav(_xyz())
    assert reason(data[:-120], default_policy, name=WAV_NAME) == "truncated"


def test_wav_burst_with_nan_is_a_bad_value(default_policy):
    xyz = _xyz()
    xyz[7, 1] = np.nan
    assert reason(accel_wav(xyz), default_policy, name=WAV_NAME) == "bad_value"


def test_wav_burst_without_a_stamp_is_a_bad_timestamp(default_policy):
    assert reason(accel_wav(_xyz()), default_policy, name="burst.accel.wav") == "bad_timestamp"


def test_wav_burst_at_another_rate_is_a_bad_rate(default_policy):
    assert reason(accel_wav(_xyz(), rate=50), default_policy, name=WAV_NAME) == "bad_rate"


def test_wav_burst_in_m_per_s2_is_a_bad_unit(default_policy):
    # The binary burst is in g; 9.8 on the vertical axis is m/s^2 (3rd CGPM 1901: g_n = 9.80665).
    assert reason(accel_wav(_xyz() * STANDARD_GRAVITY), default_policy, name=WAV_NAME) == "bad_unit"


def test_wav_burst_of_one_sample_is_too_short(default_policy):
    assert reason(accel_wav(_xyz(1)), default_policy, name=WAV_NAME) == "too_short"


@pytest.mark.parametrize("n", [1, 2, 7, 600, 601])
def test_partition_median_equals_numpy_median(n):
    # Reference: numpy.median (the mean of the two middle values for even n).
    from agent.intake.readers.accel import _median

    x = np.random.default_rng(n).standard_normal(n)
    assert _median(x) == float(np.median(x))


# -- the whole reader against the csv module, edge cases of the text form ----------------
# Reference: Python's csv module splits the rows (it accepts \n, \r\n and \r line ends) and
# float() converts each field; blank lines carry no sample.  The reader must give the same
# samples, whichever of its parsers read the body.
def _csv_reference(data: bytes) -> np.ndarray:
    import csv

    text = data.decode("utf-8-sig")
    rows = [r for r in csv.reader(io.StringIO(text, newline=""))][2:]
    return np.array([[float(f) for f in r] for r in rows if r], dtype=np.float64)


def _rows(n=40, start=T0):
    rng = np.random.default_rng(n)
    xyz = rng.normal(0.0, 0.05, (n, 3)) + [0.0, 0.0, 1.0]
    return [f"{start + i / 10:.1f},{x:.4f},{y:.4f},{z:.4f}" for i, (x, y, z) in enumerate(xyz)]


@pytest.mark.parametrize("n", [40, 3000])   # below and above PLAIN_MIN_BYTES
@pytest.mark.parametrize("variant", ["lf", "crlf", "no_final_newline", "blank_lines", "exponents",
                                     "header_case_and_spaces", "bom", "spaces_in_fields"])
def test_reader_equals_the_csv_module(default_policy, n, variant):
    lines = ["# unit=g rate_hz=10", "time,x,y,z"] + _rows(n)
    end = "\n"
    if variant == "crlf":
        end = "\r\n"
    if variant == "blank_lines":
        lines[5:5] = ["", ""]
        lines.append("")
    if variant == "exponents":
        lines[4] = ",".join(f"{float(f):.15e}" for f in lines[4].split(","))
    if variant == "header_case_and_spaces":
        lines[1] = " Time, X ,y,Z "
    if variant == "spaces_in_fields":
        lines[6] = lines[6].replace(",", " , ")
    text = end.join(lines) + ("" if variant == "no_final_newline" else end)
    data = ("\ufeff" if variant == "bom" else "").encode() + text.encode()
    ref = _csv_reference(data)
    rec = read_accel(NAME, data, default_policy, now=NOW)
    assert np.array_equal(rec.t, ref[:, 0]) and np.array_equal(rec.xyz_g, ref[:, 1:])


def _bad_value_detail(data, policy):
    with pytest.raises(RejectedInput) as e:
        read_accel(NAME, data, policy, now=NOW)
    assert e.value.reason == "bad_value"
    return str(e.value)


def _file(rows):
    return ("# unit=g rate_hz=10\ntime,x,y,z\n" + "\n".join(rows) + "\n").encode()


@pytest.mark.parametrize("n", [40, 3000])
def test_a_bad_value_names_its_line_and_column_not_its_content(default_policy, n):
    rows = _rows(n)
    rows[9] = rows[9].split(",", 1)[0] + ",secret,0,1"       # file line 12: unit, header, 9 rows before
    msg = _bad_value_detail(_file(rows), default_policy)
    assert "line 12" in msg and "x value" in msg and "secret" not in msg


def test_a_bad_value_after_blank_lines_names_the_file_line(default_policy):
    rows = _rows(40)
    rows[3:3] = ["", ""]
    rows[9] = rows[9].rsplit(",", 1)[0] + ",oops"          # file line 12 (blank lines counted)
    assert "line 12" in _bad_value_detail(_file(rows), default_policy)


def test_a_row_with_three_values_names_its_line(default_policy):
    rows = _rows(40)
    rows[20] = rows[20].rsplit(",", 1)[0]                   # file line 23
    msg = _bad_value_detail(_file(rows), default_policy)
    assert "line 23" in msg and "3 values" in msg


def test_every_row_with_five_values_is_a_bad_value(default_policy):
    rows = [r + ",0.5" for r in _rows(40)]
    msg = _bad_value_detail(_file(rows), default_policy)
    assert "line 3" in msg and "5 values" in msg


@pytest.mark.parametrize("token", ["nan", "inf", "-inf", "NaN", "Infinity"])
def test_nan_and_inf_name_their_line(default_policy, token):
    rows = _rows(3000)
    rows[2500] = rows[2500].rsplit(",", 1)[0] + "," + token   # file line 2503
    msg = _bad_value_detail(_file(rows), default_policy)
    assert "line 2503" in msg and "z value is NaN or infinite" in msg


def test_a_trailing_comma_is_a_bad_value(default_policy):
    rows = _rows(40)
    rows[0] += ","
    assert "line 3 has 5 values" in _bad_value_detail(_file(rows), default_policy)


@pytest.mark.parametrize("header", ["time,x,y", "t,x,y,z", "time;x;y;z", "time,x,y,z,w"])
def test_header_variants_that_are_not_time_x_y_z_are_bad_header(default_policy, header):
    data = ("# unit=g rate_hz=10\n" + header + "\n" + "\n".join(_rows(40)) + "\n").encode()
    assert reason(data, default_policy) == "bad_header"


# Reference: numpy.median (the mean of the two middle values for even n).  Values drawn
# from a few points around the limits, so the counts often sit exactly at the boundary
# and the two middle values often straddle a limit.
_near_limits = st.sampled_from([0.0, 0.1, 0.29, 0.3, 0.31, 1.0, 2.9, 3.0, 3.1, 9.8])


@given(st.lists(_near_limits, min_size=1, max_size=12))
@settings(max_examples=400, deadline=None)
def test_median_within_equals_numpy_median(values):
    from agent.intake.readers.accel import median_within

    x = np.array(values)
    assert median_within(x, 0.3, 3.0) == (0.3 <= float(np.median(x)) <= 3.0)


def test_median_of_two_values_straddling_the_lower_limit():
    # (0.1 + 0.9) / 2 = 0.5 is inside 0.3-3 although one middle value is below 0.3.
    from agent.intake.readers.accel import median_within

    assert median_within(np.array([0.1, 0.9]), 0.3, 3.0)
    assert not median_within(np.array([0.1, 0.2, 0.9, 9.0]), 0.3, 0.5)
