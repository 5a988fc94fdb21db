"""Link swaps during intake: inbox entries and subfolders swapped for links to an outside folder 10,000
times while drains run; the outside files must stay byte for byte (docs/intake.md, Destruction)."""

from __future__ import annotations


import pytest

from intake_samples import make_home, mood_csv_bytes
from link_swaps import LinkSwaps, real_dir, real_file, snapshot


@pytest.mark.slow
@pytest.mark.timeout(300)
def test_10000_link_swaps_during_intake(tmp_path):
    from agent.intake.pipeline import Intake, drain

    h = make_home(tmp_path / "home")
    policy = h.load_policy()
    outside = tmp_path / "outside"
    outside.mkdir()
    (outside / "a.mood.csv").write_bytes(mood_csv_bytes(policy))
    (outside / "b.wav").write_bytes(b"RIFF" + b"\x01" * 5000)
    before = snapshot(outside)
    entries = [("sub", outside, real_dir({"a.mood.csv": mood_csv_bytes(policy), "b.wav": b"RIFF" + b"\x02" * 100})),
               ("a.mood.csv", outside / "a.mood.csv", real_file(b"RIFF" + b"\x03" * 100)),
               ("b.wav", outside / "b.wav", real_file(b"RIFF" + b"\x03" * 100))]
    passes = 0
    with Intake(h, policy) as it, LinkSwaps(h.inbox, tmp_path, entries) as race:
        while race.running:
            drain(h, policy, settle_s=0.0, intake=it)
            passes += 1
    assert race.swaps >= 10_000 and passes > 0
    assert snapshot(outside) == before
