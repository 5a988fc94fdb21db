"""Canaries: coordinates, times and a tone planted in raw input reach neither the bundle nor the home.

One simulated day from the demo generator, plus planted files, goes through the
real pipeline (intake, codebook, episodes) and out as a bundle that the study
opens.  Then the decrypted payload, the bundle bytes and every file left in the
home are searched for the planted values.
"""

from __future__ import annotations

from card_pin import card_fingerprint  # the participant confirms the study key (issue 12, finding 8)
import json
import re
import time

import numpy as np
import pytest
from datetime import UTC

pytestmark = pytest.mark.slow

CANARY_LAT, CANARY_LON = "38.7172631", "-27.2163377"  # planted GPX coordinates (fictional)
CANARY_TIME = "13:37:42"
TONE_HZ = 1234.5


def _canary_gpx(day_start: float) -> bytes:
    from datetime import datetime

    day = datetime.fromtimestamp(day_start + 6 * 3600, UTC).strftime("%Y-%m-%d")
    pts = "\n".join(f'      <trkpt lat="{CANARY_LAT[:-1]}{i}" lon="{CANARY_LON[:-1]}{i}">'
                    f"<ele>12.0</ele><time>{day}T{CANARY_TIME[:-1]}{i}Z</time><hdop>1.0</hdop></trkpt>"
                    for i in range(2, 5))
    return ('<?xml version="1.0" encoding="UTF-8"?>\n<gpx version="1.1" creator="canary" '
            'xmlns="http://www.topografix.com/GPX/1/1">\n  <trk><trkseg>\n' + pts +
            "\n  </trkseg></trk>\n</gpx>\n").encode()


def test_planted_values_leave_no_trace(tmp_path):
    import soundfile as sf

    from agent.codebook import run_codebook
    from agent.demo.generator import Scenario, simulate_days, write_day
    from agent.episodes import build_episodes
    from agent.home import Home
    from agent.intake.pipeline import drain
    from agent.participant.enrol import enrol
    from agent.policy import bundled_policy_path, load_policy
    from agent.study.card import write_card
    from agent.study.keys import study_keygen
    from agent.study.open import open_bundles
    from agent.study.registry import enroll
    from agent.export import export_bundle
    from agent.vault import Vault

    from _bundle_fixtures import FAST_N, PASS

    policy_path = bundled_policy_path("default")
    policy = load_policy(policy_path)
    study = tmp_path / "study"
    study_keygen(study, policy.study.study_id, PASS, scrypt_n=FAST_N)
    card = write_card(study, [policy_path], "desk", tmp_path / "card.json")
    start = float((int(time.time()) // 86400 - 9) * 86400)
    enrol(tmp_path / "home", card, policy_path, consent=policy.study.study_id, now=start,
          enrolment_out=tmp_path / "enrolment.json", confirm_fingerprint=card_fingerprint(card))
    enroll(study, tmp_path / "enrolment.json")
    home = Home(tmp_path / "home")

    timeline = simulate_days(Scenario.load(), start, 1, 11)
    files = write_day(timeline, 0, home.inbox, policy, 11)
    # Canaries: every coordinate the recorder wrote, a planted track, a planted tone.
    coords = set()
    for f in files:
        if f.suffix == ".gpx":
            coords |= set(re.findall(r'(?:lat|lon)="(-?\d+\.\d{7})"', f.read_text()))
    (home.inbox / "gps_canary.gpx").write_bytes(_canary_gpx(start))
    sr = policy.intake.audio_sr
    t = np.arange(int(sr * policy.schedule.audio_snippet_seconds)) / sr
    sf.write(home.inbox / "snd_canary.wav", 0.3 * np.sin(2 * np.pi * TONE_HZ * t), sr, subtype="PCM_16")
    pcm = (home.inbox / "snd_canary.wav").read_bytes()[-4096:-4096 + 64]
    needles = [c.encode() for c in coords] + [CANARY_LAT[:-1].encode(), CANARY_LON[:-1].encode(),
                                              CANARY_TIME[:-1].encode()]
    raw = b"".join(p.read_bytes() for p in home.inbox.iterdir())
    assert coords and all(n in raw for n in needles) and pcm in raw  # the search can find them

    drain(home, policy)
    with Vault.open(home) as vault:
        run_codebook(home, policy, vault)
        build_episodes(home, policy, vault)
    bundle = export_bundle(home, policy, now=start + 2 * 86400)
    open_bundles(study, [bundle], PASS)

    received = next((study / "received").rglob("*.json")).read_text()
    blobs = {"payload": received.encode(), "bundle": bundle.read_bytes()}
    for p in home.root.rglob("*"):
        if p.is_file() and not p.is_symlink():
            blobs[str(p)] = p.read_bytes()
    for where, blob in blobs.items():
        for n in needles:
            assert n not in blob, f"{n!r} found in {where}"
        assert pcm not in blob, f"raw audio samples found in {where}"
    assert list(home.inbox.iterdir()) == []
    assert json.loads(received)["payload"]["counts"]["hours"] > 0
