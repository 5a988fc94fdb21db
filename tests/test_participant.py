"""Enrolment, status, pause and withdrawal on a real home."""

from __future__ import annotations

import json
import os

import pytest

from agent.errors import DataError, StateError


@pytest.fixture
def card(tmp_path, repo):
    from agent.study.card import write_card
    from agent.study.keys import study_keygen

    study = tmp_path / "study"
    study_keygen(study, "harbour-days-2027", b"test passphrase", scrypt_n=2**10)
    return write_card(study, [repo / "policies" / "default.toml"], contact="test desk",
                      out=tmp_path / "card.json")


@pytest.fixture
def enrolled(tmp_path, card, repo):
    from agent.participant.enrol import enrol

    res = enrol(tmp_path / "p-home", card, repo / "policies" / "default.toml",
                consent="harbour-days-2027", now=1_790_000_000.0)
    return res


def test_enrolment_creates_private_home_and_signed_enrolment(enrolled):
    from agent.study.card import load_enrolment

    root = enrolled["home"]
    assert oct(os.stat(root).st_mode & 0o777) == "0o700"
    doc = load_enrolment(enrolled["enrolment"])  # verifies the device signature
    assert doc["pseudonym"] == enrolled["pseudonym"]
    assert doc["device_key_id"] == enrolled["device_key_id"]


def test_consent_must_be_the_study_id(tmp_path, card, repo):
    from agent.participant.enrol import enrol

    with pytest.raises(DataError, match="type the study id 'harbour-days-2027'"):
        enrol(tmp_path / "h", card, repo / "policies" / "default.toml", consent="yes")
    assert not (tmp_path / "h").exists()


def test_unapproved_policy_is_refused(tmp_path, card, repo):
    from agent.participant.enrol import enrol

    with pytest.raises(StateError, match="is not approved by the study card"):
        enrol(tmp_path / "h", card, repo / "policies" / "strict.toml", consent="harbour-days-2027")
    assert not (tmp_path / "h").exists()


def test_enrolling_twice_is_refused(enrolled, card, repo):
    from agent.participant.enrol import enrol

    with pytest.raises(StateError, match="already enrolled"):
        enrol(enrolled["home"], card, repo / "policies" / "default.toml", consent="harbour-days-2027")


def test_status_of_a_fresh_home(enrolled):
    from agent.participant.status import collect_status, status_text

    st = collect_status(enrolled["home"])
    assert st["pseudonym"] == enrolled["pseudonym"]
    assert st["agent"]["paused"] is False
    assert st["intake"]["inbox"]["files"] == 0
    assert "The inbox is empty" in status_text(st)


def test_pause_and_resume_are_ledgered(enrolled):
    from agent.commands.participant import _ledger
    from agent.home import Home
    from agent.ledger import Ledger
    from agent.pause import clear_pause, is_paused, set_paused

    home = Home(enrolled["home"])
    set_paused(home, until=None, ledger=_ledger(home))
    assert is_paused(home)
    clear_pause(home, ledger=_ledger(home))
    assert not is_paused(home)
    events = [e["event"] for e in Ledger(home).entries()]
    assert events[-2:] == ["paused", "resumed"]


def test_withdrawal_leaves_only_a_verifiable_certificate(enrolled):
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

    from agent.home import Home
    from agent.participant.withdraw import withdraw
    from agent.study.keys import b64d
    from agent.study.withdrawal import verify_withdrawal_signature
    from agent.vault import Vault

    home = Home(enrolled["home"])
    enrolment = json.loads(open(enrolled["enrolment"]).read())  # the researcher's copy
    with Vault.open(home) as v:
        v.put("episodes", "k", {"place": "P1"})
    (home.inbox / "waiting.wav").write_bytes(b"RIFF....")
    withdraw(home)
    left = [os.path.relpath(os.path.join(d, f), home.root) for d, _, fs in os.walk(home.root) for f in fs]
    assert left == ["withdrawal-certificate.json"]
    cert = json.loads((home.root / "withdrawal-certificate.json").read_text())
    assert cert["counts_destroyed"]["episodes"] == 1 and cert["counts_destroyed"]["inbox_files"] == 1
    # Ed25519 (RFC 8032) signature checked with the public key the researcher registered at enrolment
    pub = Ed25519PublicKey.from_public_bytes(b64d(enrolment["device_public_key"], what="k", source="t"))
    check = verify_withdrawal_signature(cert, public_key=pub)
    assert check.pseudonym == enrolled["pseudonym"]


def test_duration_parsing():
    from agent.commands.participant import parse_duration
    from agent.errors import UsageError

    assert parse_duration("90s") == 90 and parse_duration("2h") == 7200 and parse_duration("1.5d") == 129600
    with pytest.raises(UsageError, match="expected a number and a unit"):
        parse_duration("soon")


def test_enrolment_carries_the_ledger_origin(enrolled):
    # Issue 12, finding 3: the study learns where this device's ledger begins.
    from agent.ledger import Ledger
    from agent.study.card import load_enrolment

    first = next(Ledger(enrolled["home"]).entries())
    assert load_enrolment(enrolled["enrolment"])["log_origin"] == first["hash"]
