"""Valid samples of every inbox format and hypothesis strategies that damage them (shared by
tests/test_fuzz_readers.py and the longer run in tests/fuzz/fuzz_readers.py)."""

from __future__ import annotations

import io
import json

import numpy as np
from hypothesis import strategies as st

T0 = 1793800800.0            # 2026-11-04T14:00:00Z
STAMP = "20261104T140000Z"
NOW = T0 + 3600.0


def _audio(fmt: str, subtype: str) -> bytes:
    import soundfile as sf

    sr = 16000
    t = np.arange(3 * sr) / sr
    y = (0.1 * np.sin(2 * np.pi * 440 * t) + 0.01 * np.random.default_rng(0).standard_normal(t.size))
    buf = io.BytesIO()
    sf.write(buf, y.astype(np.float32), sr, format=fmt, subtype=subtype)
    return buf.getvalue()


def _accel_wav() -> bytes:
    import soundfile as sf

    rng = np.random.default_rng(1)
    xyz = np.column_stack([0.02 * rng.standard_normal(600), 0.02 * rng.standard_normal(600),
                           1.0 + 0.02 * rng.standard_normal(600)]).astype(np.float32)
    buf = io.BytesIO()
    sf.write(buf, xyz, 10, format="WAV", subtype="FLOAT")
    return buf.getvalue()


def _nmea() -> bytes:
    body = b"GPRMC,140000,A,3830.000,N,02838.000,W,0.0,0.0,041126,,,A"
    c = 0
    for x in body:
        c ^= x
    return b"$" + body + b"*%02X\n" % c


def valid_samples(policy) -> dict[str, bytes]:
    """One valid file per reader (name -> bytes), every suffix lethe reads."""
    emotions = list(policy.schedule.emotions)
    lo = policy.schedule.mood_scale_min
    accel_rows = "\n".join(f"{T0 + i / 10:.1f},0.01,0.02,1.0{i % 7}" for i in range(600))
    gpx = ('<?xml version="1.0"?>\n<gpx version="1.1" xmlns="http://www.topografix.com/GPX/1/1"><trk><trkseg>'
           '<trkpt lat="38.5" lon="-28.6"><time>2026-11-04T14:00:00Z</time></trkpt>'
           '<trkpt lat="38.5001" lon="-28.6001"><time>2026-11-04T14:05:00Z</time></trkpt>'
           '</trkseg></trk></gpx>')
    return {
        f"snd_{STAMP}.wav": _audio("WAV", "PCM_16"),
        f"snd_{STAMP}.flac": _audio("FLAC", "PCM_16"),
        f"snd_{STAMP}.ogg": _audio("OGG", "VORBIS"),
        f"burst_{STAMP}.accel.wav": _accel_wav(),
        "burst.accel.csv": f"# unit=g rate_hz=10\ntime,x,y,z\n{accel_rows}\n".encode(),
        "loc.gps.csv": b"time,lat,lon,accuracy_m\n2026-11-04T14:00:00Z,38.5,-28.6,10\n"
                       b"2026-11-04T14:05:00Z,38.5001,-28.6001,10\n",
        "loc.gpx": gpx.encode(),
        "loc.nmea": _nmea(),
        "prompt.mood.csv": (",".join(["time"] + emotions) + "\n2026-11-04T14:00:00Z,"
                            + ",".join(str(lo) for _ in emotions) + "\n").encode(),
        "prompt.mood.json": json.dumps({"reports": [{"time": "2026-11-04T14:00:00Z",
                                                     "ratings": {e: lo for e in emotions}}]}).encode(),
    }


NAMES = (f"snd_{STAMP}.wav", f"snd_{STAMP}.flac", f"snd_{STAMP}.ogg", f"burst_{STAMP}.accel.wav",
         "burst.accel.csv", "loc.gps.csv", "loc.gpx", "loc.nmea", "prompt.mood.csv", "prompt.mood.json")

# Damage: cut at a fraction, overwrite bytes at fractions, insert a run of one byte value.
damage = st.fixed_dictionaries({
    "cut": st.floats(0.0, 1.0),
    "flips": st.lists(st.tuples(st.floats(0.0, 1.0), st.integers(0, 255)), max_size=8),
    "insert": st.one_of(st.none(), st.tuples(st.floats(0.0, 1.0), st.integers(0, 255), st.integers(1, 4096))),
})

# Text formats: replace one field of one line with a hostile token.
TOKENS = ["", "nan", "inf", "-inf", "1e309", "-0", "9" * 400, "0x1p3", "\u00e9", "\u202e", "\x00", '"', ",,,",
          "2026-02-30T25:61:61Z", "1970-01-01T00:00:00Z", "9999-12-31T23:59:59Z", "-91", "181", "true", "[]", "{}",
          "\r", "\\", "&amp;", "<!ENTITY x 'y'>"]
field_edit = st.tuples(st.floats(0.0, 1.0), st.integers(0, 8), st.sampled_from(TOKENS))


def apply_damage(data: bytes, d: dict) -> bytes:
    b = bytearray(data)
    for pos, val in d["flips"]:
        if b:
            b[int(pos * (len(b) - 1))] = val
    if d["insert"] is not None:
        pos, val, n = d["insert"]
        i = int(pos * len(b))
        b[i:i] = bytes([val]) * n
    return bytes(b[: max(1, int(d["cut"] * len(b)))]) if d["cut"] < 1.0 else bytes(b)


def edit_field(data: bytes, edit) -> bytes:
    """Replace field ``k`` of line ``pos`` (a fraction of the lines) by ``token`` in a text file."""
    pos, k, token = edit
    lines = data.decode("utf-8", "replace").split("\n")
    i = int(pos * (len(lines) - 1))
    sep = "," if "," in lines[i] else " "
    fields = lines[i].split(sep)
    fields[k % len(fields)] = token
    lines[i] = sep.join(fields)
    return "\n".join(lines).encode("utf-8", "surrogatepass")


def outcome(featurise, name, data, policy):
    """featurise's result or its RejectedInput; anything else escapes (a finding)."""
    from agent.errors import RejectedInput

    try:
        return featurise(name, data, policy, now=NOW)
    except RejectedInput as e:
        assert e.reason, "a rejection without a reason code"
        return e
