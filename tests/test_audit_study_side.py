"""``lethe audit verify`` with the study's copies of the device key and policy (issue 12,
finding 3), a withdrawn home verified as withdrawn, and the plain statement of what a
device-signed ledger can and cannot prove."""

from __future__ import annotations

import shutil

import pytest

from agent.audit.verify import PROVES, verify_home
from agent.cli import main
from agent.errors import EXIT_FAILURE, EXIT_INTEGRITY, EXIT_OK
from agent.home import Home
from agent.keystore import Keystore
from agent.ledger import Ledger
from card_pin import card_fingerprint

STUDY = "harbour-days-2027"


@pytest.fixture
def card(tmp_path, repo):
    from agent.study.card import write_card
    from agent.study.keys import study_keygen

    study = tmp_path / "study"
    study_keygen(study, STUDY, b"test passphrase", scrypt_n=2**10)
    return write_card(study, [repo / "policies" / "default.toml"], contact="desk", out=tmp_path / "card.json")


@pytest.fixture
def enrolled(tmp_path, card, repo):
    from agent.participant.enrol import enrol

    res = enrol(tmp_path / "home", card, repo / "policies" / "default.toml", consent=STUDY,
                enrolment_out=tmp_path / "enrolment.json", confirm_fingerprint=card_fingerprint(card))
    home = Home(res["home"])
    Ledger(home, Keystore(home).device_key()).append("agent_start")
    return home, tmp_path / "enrolment.json"


def restart_ledger(tmp_path, home):
    """Finding 3's attacker: the ledger replaced by a fresh one signed with the device key."""
    other = Home(tmp_path / "elsewhere").create()
    lg = Ledger(other, Keystore(home).device_key())
    lg.append("policy", fingerprint=home.load_policy().fingerprint)
    lg.append("agent_start")
    shutil.copy(other.ledger_path, home.ledger_path)
    shutil.copy(other.ledger_head_path, home.ledger_head_path)


def test_enrolled_home_verifies_against_its_enrolment(enrolled):
    home, enrolment = enrolled
    r = verify_home(home, enrolment=enrolment)
    assert r.ok and r.key_source == "enrolment", r.report.problems


def test_restarted_ledger_passes_alone_but_fails_against_the_enrolment(tmp_path, enrolled):
    home, enrolment = enrolled
    restart_ledger(tmp_path, home)
    assert verify_home(home).ok  # the device's own files cannot show this (see PROVES)
    r = verify_home(home, enrolment=enrolment)
    assert r.exit_code == EXIT_INTEGRITY
    assert r.report.messages("origin")[0].startswith("the ledger starts at entry hash")


def test_cli_verify_with_enrolment_exit_code(tmp_path, enrolled, capsys):
    home, enrolment = enrolled
    restart_ledger(tmp_path, home)
    rc = main(["audit", "verify", "--home", str(home.root), "--enrolment", str(enrolment)])
    assert rc == EXIT_INTEGRITY
    assert "FAIL  log origin (from the enrolment)" in capsys.readouterr().out


def test_edited_home_policy_is_judged_by_the_approved_one(tmp_path, enrolled, repo):
    # The home's policy.toml is edited to keep raw data for a day and the agent records it.
    home, enrolment = enrolled
    text = home.policy_path.read_text().replace("raw_seconds = 30", "raw_seconds = 86400")
    home.policy_path.write_text(text)
    Ledger(home, Keystore(home).device_key()).append("policy", fingerprint=home.load_policy().fingerprint)
    assert verify_home(home).ok  # the home agrees with itself
    r = verify_home(home, policy=repo / "policies" / "default.toml", enrolment=enrolment)
    assert r.exit_code == EXIT_FAILURE and r.policy_source == "file"
    assert r.policy_findings[0]["message"].startswith("the approved policy (fingerprint")


def test_the_text_says_what_the_ledger_can_and_cannot_prove(enrolled):
    home, _ = enrolled
    text = verify_home(home).text()
    assert all(p in text for p in PROVES)
    assert "What it cannot show: that the device recorded every file that arrived" in text


def test_withdrawn_home_verifies_as_withdrawn(enrolled, capsys):
    from agent.participant.withdraw import withdraw

    home, enrolment = enrolled
    withdraw(home)
    r = verify_home(home, enrolment=enrolment)
    assert r.exit_code == EXIT_OK and r.verdict().startswith("WITHDRAWN: the participant withdrew at")
    assert r.withdrawn["key_source"] == "the enrolment"
    assert main(["audit", "verify", "--home", str(home.root)]) == EXIT_OK
    assert "WITHDRAWN" in capsys.readouterr().out


def test_withdrawn_home_with_a_forged_certificate_fails(enrolled):
    import json

    from agent.participant.withdraw import CERT_NAME, withdraw

    home, enrolment = enrolled
    withdraw(home)
    cert = json.loads((home.root / CERT_NAME).read_text())
    cert["counts_destroyed"]["episodes"] = 999
    (home.root / CERT_NAME).write_text(json.dumps(cert))
    r = verify_home(home, enrolment=enrolment)
    assert r.exit_code == EXIT_INTEGRITY and r.verdict().startswith("FAILED: the home was withdrawn")


def test_board_report_warns_about_plain_keys(enrolled, tmp_path):
    from agent.audit.report import write_report

    home, _ = enrolled  # the suite chooses plain key files (tests/conftest.py)
    page = write_report(home, tmp_path / "r").read_text()
    assert "Warning: this home keeps its keys as plain files" in page


def test_board_report_of_a_withdrawn_home(enrolled, tmp_path):
    import json

    from agent.audit.report import write_report
    from agent.participant.withdraw import withdraw

    home, _ = enrolled
    withdraw(home)
    out = tmp_path / "r"
    write_report(home, out)
    figures = json.loads((out / "report.json").read_text())
    assert figures["exit_code"] == EXIT_OK and figures["verdict"].startswith("WITHDRAWN")
    assert main(["audit", "report", "--out", str(tmp_path / "r2"), "--home", str(home.root)]) == EXIT_OK
