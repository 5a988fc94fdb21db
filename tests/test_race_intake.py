"""Link swaps during intake: inbox entries and subfolders swapped for links to an outside folder 10,000
times while drains run; the outside files must stay byte for byte (docs/intake.md, Destruction)."""

from __future__ import annotations

import os
import threading

import pytest

from intake_samples import make_home, mood_csv_bytes


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
    before = {p.name: p.read_bytes() for p in outside.iterdir()}
    swaps, stop = [0], threading.Event()

    def swapper():
        i = 0
        while swaps[0] < 10_000 and not stop.is_set():
            i += 1
            for name, target in (("sub", outside), ("a.mood.csv", outside / "a.mood.csv"),
                                 ("b.wav", outside / "b.wav")):
                p = h.inbox / name
                try:
                    if os.path.islink(p) or not os.path.lexists(p):
                        if os.path.islink(p):
                            os.unlink(p)
                        if name == "sub":
                            os.mkdir(p)
                            (p / "a.mood.csv").write_bytes(mood_csv_bytes(policy))
                            (p / "b.wav").write_bytes(b"RIFF" + b"\x02" * 100)
                        else:
                            p.write_bytes(b"RIFF" + b"\x03" * 100)
                    else:
                        os.rename(p, tmp_path / f"aside{i}-{name}")
                        os.symlink(target, p)
                    swaps[0] += 1
                except OSError:
                    pass

    th = threading.Thread(target=swapper)
    th.start()
    passes = 0
    try:
        with Intake(h, policy) as it:
            while th.is_alive():
                drain(h, policy, settle_s=0.0, intake=it)
                passes += 1
    finally:
        stop.set()
        th.join()
    assert swaps[0] >= 10_000 and passes > 0
    assert {p.name: p.read_bytes() for p in outside.iterdir()} == before
