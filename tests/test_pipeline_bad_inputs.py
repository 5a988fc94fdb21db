"""A table of bad inputs through the whole pipeline (not just the readers).

Each entry must get its own clear error naming the file and a reason code; the
inbox must end empty of our files; every file outside the inbox must survive
byte-identical; and the agent must keep going (a valid file dropped after all
of them is still featurised).  The reader-level table with finer cases is the
readers' own (tests of ``agent.intake.readers``).
"""

from __future__ import annotations

import os
import socket

import pytest

from intake_samples import T0, accel_bytes, drop, gps_csv_bytes, make_home, mood_csv_bytes, our_files, stamp, wav_bytes

S = stamp(T0)

# The classic entity-expansion bomb ("billion laughs"), ten levels deep: common
# practice in XML-parser hardening tests (defusedxml's documentation shows it).
BILLION_LAUGHS = (b'<?xml version="1.0"?>\n<!DOCTYPE gpx [\n<!ENTITY lol "lol">\n'
                  + b"".join(f'<!ENTITY lol{i} "{("&lol" + (str(i - 1) if i > 1 else "") + ";") * 10}">\n'
                             .encode() for i in range(1, 10))
                  + b']>\n<gpx version="1.1" xmlns="http://www.topografix.com/GPX/1/1">'
                    b'<trk><name>&lol9;</name></trk></gpx>\n')


def _xxe(target) -> bytes:
    return (f'<?xml version="1.0"?>\n<!DOCTYPE gpx [<!ENTITY x SYSTEM "file://{target}">]>\n'
            f'<gpx version="1.1" xmlns="http://www.topografix.com/GPX/1/1"><trk><name>&x;</name>'
            f'<trkseg><trkpt lat="38.5" lon="-28.6"><time>2026-11-04T12:00:00Z</time></trkpt></trkseg>'
            f'</trk></gpx>\n').encode()


# NMEA 0183 RMC example sentence, widely reproduced with checksum *6A; here every
# checksum is altered so each sentence fails the XOR check.
NMEA_BAD = b"".join(
    f"$GPRMC,{h:02d}3519,A,4807.038,N,01131.000,E,022.4,084.4,041126,003.1,W*00\r\n".encode()
    for h in range(10, 14))


def _truncated_wav() -> bytes:
    w = wav_bytes()
    return w[: len(w) // 3]  # header claims 3 s, a third is there


def _silent_wav() -> bytes:
    import io

    import numpy as np
    import soundfile as sf

    buf = io.BytesIO()
    sf.write(buf, np.zeros(48000, dtype=np.float32), 16000, format="WAV", subtype="PCM_16")
    return buf.getvalue()


@pytest.mark.timeout(60)
def test_bad_input_table(tmp_path):
    from agent.intake.pipeline import drain
    from agent.ledger import verify_ledger

    h = make_home(tmp_path / "home")
    policy = h.load_policy()
    inbox = h.inbox
    out = tmp_path / "outside"
    out.mkdir()
    secret = out / "secret.txt"
    secret.write_bytes(b"the participant's own notes\n")
    linked = out / f"linked_{S}.wav"
    linked.write_bytes(wav_bytes(seed=9))
    keep = {p: p.read_bytes() for p in (secret, linked)}

    table: dict[str, str] = {}   # name in the inbox -> expected reason code

    def add(name, data, reason):
        drop(inbox, name, data)
        table[name] = reason

    os.symlink(secret, inbox / f"snd_{S}.wav")
    table[f"snd_{S}.wav"] = "symlink"
    os.symlink(out / "missing", inbox / "dangling.gpx")
    table["dangling.gpx"] = "symlink"
    os.link(linked, inbox / f"hard_{S}.wav")
    table[f"hard_{S}.wav"] = "hardlink"
    os.mkfifo(inbox / "pipe.nmea")
    table["pipe.nmea"] = "fifo"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    try:
        sock.bind(str(inbox / "sock.accel.csv"))
        table["sock.accel.csv"] = "socket"
    except OSError:
        sock.close()
        sock = None
    with open(inbox / f"huge_{S}.wav", "wb") as f:
        f.truncate(policy.intake.max_file_bytes + 1)
    table[f"huge_{S}.wav"] = "too_large"
    add("laughs.gpx", BILLION_LAUGHS, "xml_unsafe")
    add("xxe.gpx", _xxe(secret), "xml_unsafe")
    add("broken.gpx", b"<gpx><trk>", "xml_invalid")
    add(f"cut_{S}.wav", _truncated_wav(), "truncated")
    add(f"empty_{S}.wav", b"", "empty")
    add(f"short_{S}.wav", wav_bytes(seconds=1.0), "wrong_length")
    add(f"flat_{S}.wav", _silent_wav(), "silent_corrupt")
    add(f"text_{S}.wav", b"this is not audio\n" * 50, "not_audio")
    add(f"new\nline_{S}.flac", b"just some text, no audio\n", "not_audio")
    add("sound.wav", wav_bytes(), "bad_timestamp")
    add("bad.nmea", NMEA_BAD, "bad_checksum_all")
    add("far.gps.csv", b"time,lat,lon\n2026-11-04T12:00:00Z,123.0,-28.6\n2026-11-04T12:05:00Z,-95.0,400.0\n",
        "out_of_range")
    add("latin1.gps.csv", "time,lat,lon\n2026-11-04T12:00:00Z,38.5,-28.6 \xe9\n".encode("latin-1"), "not_text")
    add("mood.mood.csv", mood_csv_bytes(policy).replace(b",1,", b",99,", 1), "rating_out_of_range")
    add("mood.mood.json", b'{"reports": [', "bad_json")
    add("ms2.accel.csv", accel_bytes().replace(b",1.0", b",9.8").replace(b",0.9", b",9.8"), "bad_unit")
    add("words.accel.csv", b"# unit=g\ntime,x,y,z\none,two,three,four\n", "bad_value")
    add("notes.docx", b"PK\x03\x04 a document", "unknown_format")
    assert len(table) >= 15

    # A valid file after all of them: the agent must still be working.
    valid = f"ok_{S}.gps.csv"
    drop(inbox, valid, gps_csv_bytes(T0))
    try:
        rep = drain(h, policy, settle_s=0.0)
    finally:
        if sock is not None:
            sock.close()

    assert our_files(inbox) == []
    for p, data in keep.items():
        assert p.read_bytes() == data, f"{p} changed"
    assert os.lstat(linked).st_nlink == 1
    assert rep.featurised == {"gps": 1}
    # One clear error per bad entry: it names the file (escaped) and the expected reason.
    assert len(rep.errors) == len(table)
    for name, reason in table.items():
        shown = os.path.join(str(inbox), name)
        shown = shown if shown.isprintable() else repr(shown)
        matching = [e for e in rep.errors if e.startswith(shown + ": rejected (")]
        assert len(matching) == 1, (name, rep.errors)
        assert f"rejected ({reason})" in matching[0], (name, matching[0])
    assert verify_ledger(h).ok
