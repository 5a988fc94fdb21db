"""Withdrawal does not depend on the OS keyring (keys held by a real Secret Service, then unavailable).

Run under ``bash .ci/with-keyring`` (a private D-Bus session with an unlocked
gnome-keyring; it sets LETHE_SECRET_SERVICE=1).  Skipped only when that is not
set; under CI (LETHE_CI_SERVICES=1) a missing Secret Service is a failure.
"""

from __future__ import annotations

import json
import sys

import pytest

from intake_samples import make_home
from secret_service import (forget_keyring_entries, in_a_fresh_keyring_session, require_secret_service,
                            use_real_keyring)

require_secret_service()

STUDY = "harbour-days-2027"


@pytest.fixture
def kh(tmp_path, monkeypatch):
    """A home whose three keys are held by the real Secret Service, with a ledger entry, a vault record, a drop."""
    use_real_keyring(monkeypatch)
    from agent.keystore import Keystore, key_storage
    from agent.ledger import Ledger
    from agent.vault import Vault

    h = make_home(tmp_path / "home")
    h.write_config({"study_id": STUDY, "pseudonym": "pX7QmN2a"})
    ks = Keystore(h).ensure()
    assert key_storage(h) == "keyring"
    Ledger(h, signing_key=ks.device_key()).append("agent_start", mode="once")
    with Vault.open(h) as v:
        v.put("episodes", "k", {"place": "P1"})
    (h.inbox / "snd_1.wav").write_bytes(b"RIFF" + b"\1" * 4000)
    h.entries = [json.loads((h.keys / n).read_text()) for n in ("vault.key", "content.key", "device.ed25519")]
    yield h
    forget_keyring_entries(h.entries)  # they outlive the home when the withdrawal could not reach them


def _only_the_record(h) -> dict:
    assert sorted(p.name for p in h.root.iterdir()) == ["withdrawal-unsigned.json"]
    return json.loads((h.root / "withdrawal-unsigned.json").read_text())


def test_keyring_gone_still_destroys_everything_and_leaves_an_unsigned_record(kh, monkeypatch):
    from agent.participant.withdraw import withdraw

    monkeypatch.setenv("LETHE_NO_KEYRING", "1")  # the keystore's own switch: no keyring is reachable
    res = withdraw(kh)
    doc = _only_the_record(kh)
    assert res["signed"] is False and "keyring" in res["unsigned_reason"]
    assert doc["format"] == "lethe-withdrawal-unsigned" and doc["signed"] is False and "signature" not in doc
    assert "NOT signed" in doc["why_unsigned"] and "Contact the study team" in doc["why_unsigned"]
    assert doc["pseudonym"] == "pX7QmN2a" and doc["counts_destroyed"]["inbox_files"] == 1
    assert doc["device_key_id"]  # from device.pub, which needs no secret


def test_withdraw_again_after_an_unsigned_record_is_a_no_op(kh, monkeypatch):
    from agent.participant.withdraw import withdraw

    monkeypatch.setenv("LETHE_NO_KEYRING", "1")
    withdraw(kh)
    again = withdraw(kh)
    assert again["resumed"] is True and again["signed"] is False
    _only_the_record(kh)


def test_study_refuses_the_unsigned_record(kh, monkeypatch):
    from agent.errors import IntegrityError
    from agent.participant.withdraw import withdraw
    from agent.study.withdrawal import verify_withdrawal_signature

    monkeypatch.setenv("LETHE_NO_KEYRING", "1")
    withdraw(kh)
    doc = _only_the_record(kh)
    with pytest.raises(IntegrityError, match="UNSIGNED withdrawal record.*not accepted"):
        verify_withdrawal_signature(doc, source="w.json")


def test_cli_withdraw_in_a_fresh_empty_keyring_tells_the_participant_to_contact_the_study(kh):
    # Another D-Bus session with a new, empty gnome-keyring: the entries the key files name are not there.
    r = in_a_fresh_keyring_session([sys.executable, "-m", "agent.cli", "--home", str(kh.root), "withdraw", "--yes"])
    assert r.returncode == 0, r.stderr
    assert "could NOT be signed" in r.stdout and "contact the study team" in r.stdout
    assert "has no entry" in _only_the_record(kh)["why_unsigned"]
