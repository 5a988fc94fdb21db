"""Enrolment, status, pause and withdrawal on a real home."""

from __future__ import annotations

from card_pin import card_fingerprint  # the participant confirms the study key (issue 12, finding 8)
import json
import os
from pathlib import Path

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
                consent="harbour-days-2027", now=1_790_000_000.0,
                confirm_fingerprint=card_fingerprint(card))
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
        enrol(tmp_path / "h", card, repo / "policies" / "default.toml", consent="yes",
              confirm_fingerprint=card_fingerprint(card))
    assert not (tmp_path / "h").exists()


def test_unapproved_policy_is_refused(tmp_path, card, repo):
    from agent.participant.enrol import enrol

    with pytest.raises(StateError, match="is not approved by the study card"):
        enrol(tmp_path / "h", card, repo / "policies" / "strict.toml", consent="harbour-days-2027",
              confirm_fingerprint=card_fingerprint(card))
    assert not (tmp_path / "h").exists()


def test_enrolling_twice_is_refused(enrolled, card, repo):
    from agent.participant.enrol import enrol

    with pytest.raises(StateError, match="already enrolled"):
        enrol(enrolled["home"], card, repo / "policies" / "default.toml", consent="harbour-days-2027",
              confirm_fingerprint=card_fingerprint(card))


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
    enrolment = json.loads(Path(enrolled["enrolment"]).read_text())  # the researcher's copy
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


# -- issue 12, finding 8: the study key is pinned or confirmed ------------------------------

def test_unpinned_card_without_confirmation_is_refused(tmp_path, card, repo):
    from agent.errors import IntegrityError
    from agent.participant.enrol import enrol

    with pytest.raises(IntegrityError, match="does not pin the study key"):
        enrol(tmp_path / "h", card, repo / "policies" / "default.toml", consent="harbour-days-2027")
    assert not (tmp_path / "h").exists()


def test_substituted_card_with_the_same_study_id_is_refused(tmp_path, card, repo):
    # An attacker's card: its own key, the same study id and policy; the participant
    # confirms the fingerprint the real study published.
    from agent.errors import IntegrityError
    from agent.participant.enrol import enrol
    from agent.study.card import write_card
    from agent.study.keys import study_keygen

    evil = tmp_path / "evil"
    study_keygen(evil, "harbour-days-2027", b"attacker", scrypt_n=2**10)
    fake = write_card(evil, [repo / "policies" / "default.toml"], contact="test desk", out=tmp_path / "fake.json")
    with pytest.raises(IntegrityError, match="may be a substituted card"):
        enrol(tmp_path / "h", fake, repo / "policies" / "default.toml", consent="harbour-days-2027",
              confirm_fingerprint=card_fingerprint(card))
    assert not (tmp_path / "h").exists()


def test_a_short_confirmation_is_refused(tmp_path, card, repo):
    from agent.errors import IntegrityError
    from agent.participant.enrol import enrol

    with pytest.raises(IntegrityError, match="at least 16 hex digits"):
        enrol(tmp_path / "h", card, repo / "policies" / "default.toml", consent="harbour-days-2027",
              confirm_fingerprint=card_fingerprint(card)[:8])


def test_a_pinned_policy_needs_no_confirmation(tmp_path, repo):
    from agent.participant.enrol import enrol
    from agent.study.card import write_card
    from agent.study.keys import study_keygen

    study = tmp_path / "study"
    study_keygen(study, "harbour-days-2027", b"test passphrase", scrypt_n=2**10)
    first = write_card(study, [repo / "policies" / "default.toml"], contact="d", out=tmp_path / "c0.json")
    pinned = tmp_path / "pinned.toml"
    pinned.write_text((repo / "policies" / "default.toml").read_text().replace(
        'key_fingerprint = ""', f'key_fingerprint = "{card_fingerprint(first)}"'))
    c = write_card(study, [pinned], contact="d", out=tmp_path / "c.json")
    res = enrol(tmp_path / "h", c, pinned, consent="harbour-days-2027")
    assert res["pseudonym"]


def test_init_without_a_terminal_asks_for_the_fingerprint(tmp_path, card, repo, capsys, monkeypatch):
    import io

    from agent.cli import main
    from agent.errors import EXIT_USAGE

    monkeypatch.setattr("sys.stdin", io.StringIO(""))
    rc = main(["--home", str(tmp_path / "h"), "init", "--study", str(card), "--policy",
               str(repo / "policies" / "default.toml"), "--consent", "harbour-days-2027"])
    assert rc == EXIT_USAGE
    assert "--confirm-fingerprint HEX" in capsys.readouterr().err


def test_status_warns_about_plain_keys(enrolled):
    from agent.participant.status import collect_status, status_text

    st = collect_status(enrolled["home"])  # the suite chooses plain keys (tests/conftest.py)
    assert st["keys"]["storage"] == "plain"
    assert "WARNING: the keys are plain files" in status_text(st)


def test_status_tells_about_subfolders_unfinished_files_and_the_alarm(enrolled):
    """Finding 7: status said "inbox: empty" with files in subfolders, .part and hidden files."""
    import json as _json

    from agent.home import Home
    from agent.participant.status import collect_status, status_text

    home = Home(enrolled["home"])
    (home.inbox / "2026-11-04").mkdir()
    (home.inbox / "2026-11-04" / "a.wav").write_bytes(b"x")
    (home.inbox / "b.wav.part").write_bytes(b"x")
    (home.state / "intake-alarm.json").write_text(_json.dumps({"reason": "ledger_unwritable",
                                                               "error": "OSError/No space left on device",
                                                               "since": 0, "pending": 3}))
    text = status_text(collect_status(home))
    assert "Waiting in the inbox: 2 file(s)" in text
    assert "1 in folders inside the inbox" in text and "1 not finished by the recorder" in text
    assert "WARNING: the record of what happened to your files could not be written" in text
