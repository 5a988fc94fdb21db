"""Withdrawal never follows a swapped link (finding 1) and a second withdraw finishes a killed one (finding 9)."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys

import pytest

from intake_samples import REPO, make_home
from link_swaps import LinkSwaps, real_dir, real_file, snapshot

STUDY = "harbour-days-2027"


@pytest.fixture
def wh(tmp_path):
    """A home with keys, a ledger, a vault record, inbox files in a subfolder, and an outside folder."""
    from agent.keystore import Keystore
    from agent.ledger import Ledger
    from agent.vault import Vault

    h = make_home(tmp_path / "home")
    h.write_config({"study_id": STUDY, "pseudonym": "pX7QmN2a"})
    ks = Keystore(h).ensure()
    Ledger(h, signing_key=ks.device_key()).append("agent_start", mode="once")
    with Vault.open(h) as v:
        v.put("episodes", "k", {"place": "P1"})
    (h.inbox / "2026-11-04").mkdir()
    for i in range(20):
        (h.inbox / "2026-11-04" / f"snd_{i}.wav").write_bytes(b"RIFF" + bytes([i]) * 4000)
        (h.inbox / f"loc_{i}.gps.csv").write_bytes(b"time,lat,lon\n" * 50)
    out = tmp_path / "outside"
    out.mkdir()
    for i in range(3):
        (out / f"snd_{i}.wav").write_bytes(bytes([100 + i]) * 6000)
    h.outside = out
    h.device_public = ks.device_public()
    return h


def _snap(d):
    return {p.name: p.read_bytes() for p in sorted(d.iterdir())}


def _left(h):
    return sorted(os.path.relpath(os.path.join(d, f), h.root) for d, ds, fs in os.walk(h.root) for f in fs + ds)


def _cert_ok(h):
    from agent.study.withdrawal import verify_withdrawal_signature

    cert = json.loads((h.root / "withdrawal-certificate.json").read_text())
    # Ed25519 (RFC 8032) signature checked with the device's public key taken before the withdrawal
    return verify_withdrawal_signature(cert, public_key=h.device_public)


def test_subfolder_swapped_for_link_between_listing_and_descent(wh, monkeypatch):
    """Finding 1: an inbox subfolder becomes a link to an outside folder right after it was listed.

    Path-based deletion then resolves ``inbox/2026-11-04/snd_0.wav`` through the link and zero-fills the
    outside file of the same name; deletion relative to the listed folder's descriptor cannot.
    """
    from agent.participant.withdraw import withdraw

    before = _snap(wh.outside)
    real_scandir, real_listdir = os.scandir, os.listdir
    sub_ino = os.stat(wh.inbox / "2026-11-04").st_ino
    swapped = []

    def is_sub(p):
        try:
            return os.stat(p).st_ino == sub_ino
        except (OSError, TypeError, ValueError):
            return False

    def swap():
        if not swapped:
            os.rename(wh.inbox / "2026-11-04", wh.root.parent / "aside")
            os.symlink(wh.outside, wh.inbox / "2026-11-04")
            swapped.append(1)

    class Listing:  # os.scandir's context manager and iterator, listing first, swapping after
        def __init__(self, p):
            with real_scandir(p) as it:
                self.entries = list(it)
            if is_sub(p):
                swap()

            self._it = iter(self.entries)

        def __enter__(self):
            return self

        def __exit__(self, *a):
            return False

        def __iter__(self):
            return self

        def __next__(self):
            return next(self._it)

        def close(self):
            pass

    def listdir(p="."):
        names = real_listdir(p)
        if is_sub(p):
            swap()
        return names

    monkeypatch.setattr(os, "scandir", Listing)
    monkeypatch.setattr(os, "listdir", listdir)
    withdraw(wh)
    monkeypatch.undo()
    assert swapped
    assert _snap(wh.outside) == before
    assert _left(wh) == ["withdrawal-certificate.json"]


CHILD = r"""
import os, signal, sys
from agent.home import Home
from agent.participant.withdraw import withdraw
n = int(sys.argv[2])
real = os.unlink
calls = [0]
def unlink(*a, **k):
    calls[0] += 1
    if calls[0] == n:
        os.kill(os.getpid(), signal.SIGKILL)
    return real(*a, **k)
os.unlink = unlink
withdraw(Home(sys.argv[1]))
print("finished", flush=True)
"""


@pytest.mark.parametrize("nth_unlink", [1, 3, 8, 25])
def test_second_withdraw_finishes_a_killed_one(wh, nth_unlink):
    """Finding 9: SIGKILL at the n-th unlink of a withdrawal; a second withdraw leaves only the certificate."""
    from agent.participant.withdraw import withdraw

    env = dict(os.environ, PYTHONPATH=str(REPO))
    r = subprocess.run([sys.executable, "-c", CHILD, str(wh.root), str(nth_unlink)], cwd=REPO, env=env,
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == -signal.SIGKILL, r.stderr
    assert len(_left(wh)) > 1                       # the kill left things behind
    res = withdraw(wh)
    assert _left(wh) == ["withdrawal-certificate.json"]
    assert res["counts_destroyed"]["inbox_files"] == 40   # the subfolder's files were counted too
    assert _cert_ok(wh).pseudonym == "pX7QmN2a"


def test_second_withdraw_via_the_command(wh):
    """The command finishes an interrupted withdrawal without the (already destroyed) enrolment file."""
    from agent.cli import main
    from agent.participant.withdraw import CERT_NAME

    from agent.participant.withdraw import withdraw as _w

    _w(wh)
    (wh.root / "inbox").mkdir()
    (wh.root / "inbox" / "late.wav").write_bytes(b"RIFF")   # as if the kill had left it
    assert not wh.exists()
    assert main(["--home", str(wh.root), "withdraw", "--yes"]) == 0
    assert _left(wh) == [CERT_NAME]


@pytest.mark.slow
def test_race_10000_link_swaps_during_withdrawal(wh):
    """Inbox entries and subfolders swapped for links to the outside 10,000 times while withdrawals run."""
    from agent.participant.withdraw import withdraw

    before = snapshot(wh.outside)
    box = wh.inbox
    entries = [("sub", wh.outside, real_dir({"snd_0.wav": b"q" * 64})),
               ("snd.wav", wh.outside / "snd_0.wav", real_file(b"q" * 64))]
    with LinkSwaps(box, wh.root.parent, entries) as race:
        withdraw(wh)                       # the full withdrawal, once
        while race.running:                # then the finishing pass, again and again
            box.mkdir(exist_ok=True)
            withdraw(wh)
    assert race.swaps >= 10_000
    assert snapshot(wh.outside) == before
