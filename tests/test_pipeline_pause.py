"""Pause state: stored, auto-expiring, recorded in the ledger; intake keeps nothing while paused."""

from __future__ import annotations

import json
import time

import pytest

from intake_samples import T0, drop, our_files, stamp, wav_bytes


@pytest.fixture
def ledger(h):
    from agent.keystore import Keystore
    from agent.ledger import Ledger

    return Ledger(h, signing_key=Keystore(h).ensure().device_key())


def test_not_paused_by_default(h):
    from agent.pause import is_paused

    assert is_paused(h) is False


def test_pause_without_end_lasts_until_resumed(h, ledger):
    from agent.pause import clear_pause, is_paused, set_paused

    set_paused(h, ledger=ledger)
    assert is_paused(h, now=time.time() + 10 * 86400)
    clear_pause(h, ledger=ledger)
    assert not is_paused(h)
    events = [(e["event"], e.get("until", "-")) for e in ledger.entries()]
    assert events == [("paused", None), ("resumed", "-")]


def test_pause_with_end_expires_by_itself(h, ledger):
    from agent.pause import is_paused, read_pause, set_paused

    now = time.time()
    set_paused(h, until=now + 3600, ledger=ledger, now=now)
    assert is_paused(h, now=now + 3599)
    assert not is_paused(h, now=now + 3600)
    assert read_pause(h) == {"paused": True, "since": now, "until": now + 3600}
    assert [e["until"] for e in ledger.entries()] == [now + 3600]


def test_pause_file_is_private_json(h):
    from agent.pause import set_paused

    set_paused(h)
    assert h.pause_path.stat().st_mode & 0o777 == 0o600
    doc = json.loads(h.pause_path.read_text())
    assert doc["paused"] is True and doc["until"] is None and isinstance(doc["since"], float)


def test_pause_end_in_the_past_is_refused(h):
    from agent.errors import StateError
    from agent.pause import set_paused

    with pytest.raises(StateError, match="after now"):
        set_paused(h, until=time.time() - 1)


def test_damaged_pause_file_counts_as_paused(h):
    # When in doubt keep nothing: a damaged state must not silently resume intake.
    from agent.pause import is_paused

    h.pause_path.write_text("{not json")
    assert is_paused(h) is True


def test_resume_when_not_paused_records_nothing(h, ledger):
    from agent.pause import clear_pause

    clear_pause(h, ledger=ledger)
    assert list(ledger.entries()) == []


def test_expired_pause_lets_intake_keep_again(h):
    from agent.intake.pipeline import drain
    from agent.pause import set_paused

    now = time.time()
    set_paused(h, until=now + 0.2, now=now)
    time.sleep(0.3)
    drop(h.inbox, f"snd_{stamp(T0)}.wav", wav_bytes())
    rep = drain(h, h.load_policy(), settle_s=0.0)
    assert rep.featurised == {"audio": 1} and our_files(h.inbox) == []


def test_paused_ledger_pairs_rejected_and_destroyed(h):
    from agent.intake.pipeline import drain
    from agent.ledger import Ledger, verify_ledger
    from agent.pause import set_paused

    set_paused(h)
    drop(h.inbox, f"snd_{stamp(T0)}.wav", wav_bytes())
    drain(h, h.load_policy(), settle_s=0.0)
    items = [(e["event"], e.get("reason")) for e in Ledger(h).entries() if "item" in e]
    assert items == [("received", None), ("rejected", "paused"), ("destroyed", None)]
    assert verify_ledger(h).ok
