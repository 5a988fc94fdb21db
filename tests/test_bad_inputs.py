"""A table of bad raw files, each rejected with its stable reason code (reader level).

The codes are the contract in docs/inbox-formats.md; the pipeline logs them and
destroys the file within the raw window whatever the code.
"""

from __future__ import annotations

import io
import os

import numpy as np
import pytest
import soundfile as sf

from agent.errors import EXIT_DATA, RejectedInput
from agent.intake import classify, featurise, ignored

T0 = 1793793600.0                      # 2026-11-04T12:00:00Z
NOW = T0 + 3600.0
STAMP = "20261104T120000Z"


def wav(seconds=3.0, sr=16000, y=None):
    if y is None:
        t = np.arange(int(seconds * sr)) / sr
        y = 0.2 * np.sin(2 * np.pi * 330 * t)
    buf = io.BytesIO()
    sf.write(buf, np.asarray(y, dtype=np.float32), sr, format="WAV", subtype="PCM_16")
    return buf.getvalue()


GPX_HEAD = '<?xml version="1.0"?>\n'
GPX_BODY = ('<gpx version="1.1" xmlns="http://www.topografix.com/GPX/1/1"><trk><trkseg>'
            '<trkpt lat="38.5" lon="-28.6"><time>2026-11-04T12:00:00Z</time></trkpt>'
            "</trkseg></trk></gpx>")

# The classic entity-expansion bomb ("billion laughs"): ten levels of ten-fold
# expansion would yield 10^9 copies of "lol" if a parser expanded it.
BILLION_LAUGHS = GPX_HEAD + '<!DOCTYPE gpx [\n <!ENTITY lol "lol">\n' + "".join(
    f' <!ENTITY lol{i} "{("&lol%s;" % ("" if i == 1 else i - 1)) * 10}">\n' for i in range(1, 10)
) + "]>\n" + GPX_BODY.replace("<trk>", "<trk><name>&lol9;</name>")

EXTERNAL_ENTITY = (GPX_HEAD + '<!DOCTYPE gpx [<!ENTITY xxe SYSTEM "file:///etc/passwd">]>\n'
                   + GPX_BODY.replace("<trk>", "<trk><name>&xxe;</name>"))


def nmea_bad_checksums():
    return (b"$GPRMC,120000,A,3830.000,N,02838.000,W,0.0,0.0,041126,,,A*00\n"
            b"$GPGGA,120000,3830.000,N,02838.000,W,1,08,0.9,10.0,M,50.0,M,,*00\n")


def accel(header="time,x,y,z", unit_line="# unit=g rate_hz=10", rate=10.0, n=600):
    t = T0 + np.arange(n) / rate
    rows = "\n".join(f"{a:.3f},0.01,-0.02,0.99" for a in t)
    return f"{unit_line}\n{header}\n{rows}\n".encode()


def mood(policy, columns=None, value="4"):
    cols = columns or list(policy.schedule.emotions)
    return (",".join(["time"] + cols) + "\n" + ",".join(["2026-11-04T12:00:00Z"] + [value] * len(cols))
            + "\n").encode()


def truncated_wav():
    d = wav()
    return d[: len(d) // 2]


CASES = [
    # (case id, file name, builder(policy) -> bytes, expected reason)
    ("zero_byte_file", f"snd_{STAMP}.wav", lambda p: b"", "empty"),
    ("truncated_wav", f"snd_{STAMP}.wav", lambda p: truncated_wav(), "truncated"),
    ("wav_wrong_length", f"snd_{STAMP}.wav", lambda p: wav(seconds=1.0), "wrong_length"),
    ("all_zero_wav", f"snd_{STAMP}.wav", lambda p: wav(y=np.zeros(48000)), "silent_corrupt"),
    ("random_bytes_named_wav", f"snd_{STAMP}.wav",
     lambda p: np.random.default_rng(0).bytes(20000), "not_audio"),
    ("audio_start_in_the_future", "snd_20991231T000000Z.wav", lambda p: wav(), "bad_timestamp"),
    ("billion_laughs_gpx", "t.gpx", lambda p: BILLION_LAUGHS.encode(), "xml_unsafe"),
    ("gpx_external_entity", "t.gpx", lambda p: EXTERNAL_ENTITY.encode(), "xml_unsafe"),
    ("malformed_gpx", "t.gpx", lambda p: (GPX_HEAD + GPX_BODY[:-10]).encode(), "xml_invalid"),
    ("gpx_without_track_points", "t.gpx",
     lambda p: (GPX_HEAD + '<gpx version="1.1" xmlns="http://www.topografix.com/GPX/1/1"/>').encode(),
     "no_fixes"),
    ("nmea_all_bad_checksums", "t.nmea", lambda p: nmea_bad_checksums(), "bad_checksum_all"),
    ("coordinates_out_of_range", "t.gps.csv",
     lambda p: b"time,lat,lon\n2026-11-04T12:00:00Z,95.0,-28.6\n2026-11-04T12:05:00Z,38.5,-200.0\n",
     "out_of_range"),
    ("timestamps_far_future", "t.gps.csv",
     lambda p: b"time,lat,lon\n2099-01-01T00:00:00Z,38.5,-28.6\n", "bad_timestamp"),
    ("gps_csv_wrong_header", "t.gps.csv", lambda p: b"when,y,x\n2026-11-04T12:00:00Z,38.5,-28.6\n",
     "bad_header"),
    ("accel_wrong_unit", "b.accel.csv", lambda p: accel(unit_line="# unit=mg"), "bad_unit"),
    ("accel_no_unit_line", "b.accel.csv", lambda p: accel().split(b"\n", 1)[1], "bad_unit"),
    ("accel_wrong_rate", "b.accel.csv", lambda p: accel(unit_line="# unit=g", rate=50.0, n=3000), "bad_rate"),
    ("accel_missing_column", "b.accel.csv", lambda p: accel(header="time,x,y"), "bad_header"),
    ("mood_unknown_emotion", "m.mood.csv",
     lambda p: mood(p, columns=list(p.schedule.emotions) + ["smug"]), "unknown_emotion"),
    ("mood_rating_out_of_range", "m.mood.csv", lambda p: mood(p, value="9"), "rating_out_of_range"),
    ("mood_not_utf8", "m.mood.csv", lambda p: b"time,happy\n\xff\xfe\x00", "not_text"),
    ("unknown_suffix", "notes.txt", lambda p: b"hello", "unknown_format"),
    ("bare_csv_suffix", "data.csv", lambda p: b"time,x\n", "unknown_format"),
    ("too_large", f"snd_{STAMP}.wav", lambda p: b"\0" * (p.intake.max_file_bytes + 1), "too_large"),
]


@pytest.mark.parametrize("name, build, expected", [c[1:] for c in CASES], ids=[c[0] for c in CASES])
def test_bad_input_is_rejected_with_its_reason(default_policy, name, build, expected):
    with pytest.raises(RejectedInput) as e:
        featurise(name, build(default_policy), default_policy, now=NOW)
    assert e.value.reason == expected
    assert e.value.path == name and name in str(e.value)
    assert e.value.exit_code == EXIT_DATA


def test_the_table_covers_at_least_fifteen_cases():
    assert len({c[0] for c in CASES}) == len(CASES) >= 15


def test_featurise_reads_only_the_bytes_it_is_given(tmp_path, default_policy):
    # The path is a label: the file on disk holds garbage, the bytes are valid.
    path = tmp_path / f"snd_{STAMP}.wav"
    path.write_bytes(b"not audio at all")
    os.chmod(path, 0)
    r = featurise(path, wav(), default_policy, now=NOW)
    assert r.kind == "audio"


def test_data_must_be_bytes(default_policy):
    with pytest.raises(TypeError, match="bytes"):
        featurise(f"snd_{STAMP}.wav", "text", default_policy)


@pytest.mark.parametrize("name, kind", [
    ("snd_x.wav", "audio"), ("A.FLAC", "audio"), ("a.ogg", "audio"), ("t.gpx", "gps"),
    ("t.nmea", "gps"), ("t.gps.csv", "gps"), ("b.accel.csv", "accel"), ("m.mood.csv", "mood"),
    ("m.mood.json", "mood"), ("x.csv", None), ("x.json", None), (".wav", None), ("dir/sub/a.wav", "audio"),
])
def test_classify_by_suffix(name, kind):
    assert classify(name) == kind


@pytest.mark.parametrize("name, expected", [
    ("a.wav.part", True), (".hidden.wav", True), ("a.wav", False), ("part.wav", False),
])
def test_unfinished_names_are_ignored(name, expected):
    assert ignored(name) is expected


# --- fuzzing: any bytes give an ItemResult or a RejectedInput, nothing else ---
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from agent.intake.item import ItemResult  # noqa: E402


def _valid_samples(policy):
    nmea = (b"$GPRMC,120000,A,3830.000,N,02838.000,W,0.0,0.0,041126,,,A*"
            + b"%02X" % _xor(b"GPRMC,120000,A,3830.000,N,02838.000,W,0.0,0.0,041126,,,A") + b"\n")
    return {
        f"snd_{STAMP}.wav": wav(),
        "t.gpx": (GPX_HEAD + GPX_BODY).encode(),
        "t.nmea": nmea,
        "t.gps.csv": b"time,lat,lon\n2026-11-04T12:00:00Z,38.5,-28.6\n",
        "b.accel.csv": accel(),
        "m.mood.csv": mood(policy),
    }


def _xor(b):
    c = 0
    for x in b:
        c ^= x
    return c


def _outcome(name, data, policy):
    try:
        return featurise(name, data, policy, now=NOW)
    except RejectedInput as e:
        assert e.reason and e.path == name
        return e


FUZZ = settings(max_examples=int(__import__("os").environ.get("LETHE_FUZZ_EXAMPLES", "40")), deadline=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture])


@pytest.mark.parametrize("name", [f"snd_{STAMP}.wav", "t.gpx", "t.nmea", "t.gps.csv", "b.accel.csv",
                                  "m.mood.csv", "m.mood.json"])
@FUZZ
@given(data=st.binary(min_size=1, max_size=2000))
def test_random_bytes_never_escape_as_another_exception(default_policy, name, data):
    assert isinstance(_outcome(name, data, default_policy), (ItemResult, RejectedInput))


@pytest.mark.parametrize("name", [f"snd_{STAMP}.wav", "t.gpx", "t.nmea", "t.gps.csv", "b.accel.csv",
                                  "m.mood.csv"])
@FUZZ
@given(cut=st.floats(0.0, 1.0), flips=st.lists(st.tuples(st.floats(0.0, 1.0), st.integers(0, 255)),
                                                max_size=8))
def test_damaged_valid_files_never_escape_as_another_exception(default_policy, name, cut, flips):
    data = bytearray(_valid_samples(default_policy)[name])
    assert isinstance(_outcome(name, bytes(data), default_policy), ItemResult)  # the original is valid
    for pos, val in flips:
        data[int(pos * (len(data) - 1))] = val
    data = bytes(data[: max(1, int(cut * len(data)))])
    assert isinstance(_outcome(name, data, default_policy), (ItemResult, RejectedInput))
