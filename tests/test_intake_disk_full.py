"""Finding 5 on a real full disk: a 4 MiB tmpfs holds the home.

Mounting needs root (and a kernel that allows it in this container); where it is refused the test is
skipped and the injected-ENOSPC test in tests/test_pipeline.py
(``test_ledger_that_cannot_be_written_does_not_stop_destruction``) covers the same path.
"""

from __future__ import annotations

import os
import subprocess
import time

import pytest

from intake_samples import drop, make_home, mood_csv_bytes, our_files


@pytest.fixture
def small_disk(tmp_path):
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=4m,mode=0700", "tmpfs", str(mnt)],
                       capture_output=True, text=True)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here ({r.stderr.strip() or 'not permitted'}); "
                    f"the injected-ENOSPC test covers this path")
    try:
        yield mnt
    finally:
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True)


def _fill(path) -> None:
    """Write until the file system is full (unbuffered, down to single bytes)."""
    fd = os.open(path, os.O_WRONLY | os.O_CREAT, 0o600)
    try:
        for size in (65536, 4096, 1):
            while True:
                try:
                    os.write(fd, b"\xff" * size)
                except OSError:
                    break
    finally:
        os.close(fd)


@pytest.mark.timeout(120)
def test_full_disk_destroys_on_time_logs_later_and_backs_off(small_disk):
    from agent.intake.pipeline import Intake, drain
    from agent.ledger import verify_ledger

    h = make_home(small_disk / "home")
    policy = h.load_policy()
    it = Intake(h, policy)
    it.ledger.append("agent_start", mode="once")
    drop(h.inbox, "a.mood.csv", mood_csv_bytes(policy))
    os.utime(h.inbox / "a.mood.csv", (time.time() - 5, time.time() - 5))
    filler = small_disk / "filler"
    _fill(filler)
    try:
        rep = drain(h, policy, settle_s=0.0, intake=it)
        assert our_files(h.inbox) == []                       # the raw file is gone by its deadline
        assert rep.total("destroyed") == 1
        assert 1 <= it.log.failures <= 3                      # it failed, and backed off: no busy loop
        os.unlink(filler)                                      # space again
        assert it.log.flush(force=True)                        # recorded as soon as it can be
    finally:
        it.close()
        if filler.exists():
            os.unlink(filler)
    from agent.ledger import Ledger

    ev = [e["event"] for e in Ledger(h).entries()]
    assert ev.count("received") == 1 and ev.count("destroyed") == 1
    report = verify_ledger(h)
    assert report.ok, (report.problems, report.violations)
