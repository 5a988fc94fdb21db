"""Study keys, study card, enrolment file and withdrawal certificate."""

from __future__ import annotations

import json
import os
import stat

import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from agent.errors import DataError, IntegrityError, StateError
from agent.policy import bundled_policy_path, load_policy
from agent.study.card import (check_policy_approved, load_card, load_enrolment, make_enrolment,
                              verify_enrolment, write_card)
from agent.study.keys import load_public, load_study_key, study_keygen
from agent.study.registry import Registry, enroll
from agent.study.withdrawal import (make_withdrawal_certificate, verify_withdrawal,
                                    verify_withdrawal_signature)

PASS = b"correct horse battery"
FAST_N = 2**10  # tests only; the default cost is documented in docs/researcher.md


@pytest.fixture
def study(tmp_path):
    d = tmp_path / "study"
    study_keygen(d, "harbour-days-2027", PASS, scrypt_n=FAST_N)
    card = write_card(d, [bundled_policy_path("default")], "desk", tmp_path / "card.json")
    return d, card


def test_key_files_private_and_openable(study):
    d, _ = study
    mode = stat.S_IMODE(os.stat(d / "keys" / "study.key").st_mode)
    assert mode == 0o600
    pair = load_study_key(d, PASS)
    assert pair.fingerprint == load_public(d)["key_fingerprint"]


def test_wrong_passphrase(study):
    d, _ = study
    with pytest.raises(IntegrityError, match="wrong passphrase"):
        load_study_key(d, b"not the passphrase")


def test_edited_key_file_refused(study):
    d, _ = study
    p = d / "keys" / "study.key"
    doc = json.loads(p.read_text())
    doc["study_id"] = "another-study"  # bound as associated data
    p.write_text(json.dumps(doc))
    with pytest.raises(IntegrityError, match="wrong passphrase, or the file was altered"):
        load_study_key(d, PASS)


def test_keygen_refuses_overwrite(study):
    d, _ = study
    with pytest.raises(StateError, match="already exists"):
        study_keygen(d, "harbour-days-2027", PASS, scrypt_n=FAST_N)


def test_pq_suite_roundtrip(tmp_path):
    pair = study_keygen(tmp_path / "s", "pq-study", PASS, suite="pq", scrypt_n=FAST_N)
    assert len(pair.public_bytes) == 1216
    assert load_study_key(tmp_path / "s", PASS).private_bytes == pair.private_bytes


def test_card_fields(study):
    d, path = study
    card = load_card(path)
    pol = load_policy(bundled_policy_path("default"))
    assert card.study_id == "harbour-days-2027"
    assert card.approved_policies == (pol.fingerprint,)
    assert card.consent_text == pol.study.consent_text
    assert card.suite_names["kem"] == "DHKEM(X25519, HKDF-SHA256)"
    check_policy_approved(card, pol)


def test_card_unknown_field_names_file_and_field(study, tmp_path):
    _, path = study
    doc = json.loads(path.read_text())
    doc["colour"] = "blue"
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps(doc))
    with pytest.raises(DataError, match=r"bad\.json: \[colour\] unknown field"):
        load_card(bad)


def test_card_future_version(study, tmp_path):
    _, path = study
    doc = json.loads(path.read_text())
    doc["version"] = 4
    bad = tmp_path / "v4.json"
    bad.write_text(json.dumps(doc))
    with pytest.raises(DataError, match="version 4 is not supported"):
        load_card(bad)


def test_card_version_1_is_refused(study, tmp_path):
    # Version 1 cards carry policy fingerprints over the pre-RFC 8785 form (docs/bundle-format.md).
    _, path = study
    doc = json.loads(path.read_text())
    doc["version"] = 1
    old = tmp_path / "v1.json"
    old.write_text(json.dumps(doc))
    with pytest.raises(DataError, match="version 1 is not supported"):
        load_card(old)


def test_card_v3_with_server(study, tmp_path):
    _, path = study
    doc = json.loads(path.read_text())
    doc.update(version=3, server={"url": "https://study.example.org:8443", "certificate_sha256": "ab" * 32})
    (tmp_path / "v3.json").write_text(json.dumps(doc))
    card = load_card(tmp_path / "v3.json")
    assert (card.server_url, card.server_pin) == ("https://study.example.org:8443", "ab" * 32)
    assert card.as_dict()["version"] == 3 and card.as_dict()["server"]["url"] == card.server_url


def test_card_v3_without_server_field(study, tmp_path):
    _, path = study
    doc = json.loads(path.read_text())
    doc["version"] = 3
    (tmp_path / "v3.json").write_text(json.dumps(doc))
    with pytest.raises(DataError, match=r"\[server\] required field is missing"):
        load_card(tmp_path / "v3.json")


def test_card_v3_plain_http_refused(study, tmp_path):
    _, path = study
    doc = json.loads(path.read_text())
    doc.update(version=3, server={"url": "http://study.example.org", "certificate_sha256": "ab" * 32})
    (tmp_path / "v3.json").write_text(json.dumps(doc))
    with pytest.raises(DataError, match=r"\[server.url\] expected https://"):
        load_card(tmp_path / "v3.json")


def test_card_v3_bad_pin(study, tmp_path):
    _, path = study
    doc = json.loads(path.read_text())
    doc.update(version=3, server={"url": "https://study.example.org", "certificate_sha256": "AB" * 32})
    (tmp_path / "v3.json").write_text(json.dumps(doc))
    with pytest.raises(DataError, match=r"\[server.certificate_sha256\] expected 64 lower-case hex"):
        load_card(tmp_path / "v3.json")


def test_card_fingerprint_mismatch(study, tmp_path):
    _, path = study
    doc = json.loads(path.read_text())
    doc["key_fingerprint"] = "0" * 64
    bad = tmp_path / "fp.json"
    bad.write_text(json.dumps(doc))
    with pytest.raises(IntegrityError, match="does not match the card's public key"):
        load_card(bad)


def test_unapproved_policy_names_both_fingerprints(study):
    _, path = study
    card = load_card(path)
    strict = load_policy(bundled_policy_path("strict"))
    with pytest.raises(StateError) as e:
        check_policy_approved(card, strict)
    assert strict.fingerprint in str(e.value) and card.approved_policies[0] in str(e.value)


def test_pinned_key_mismatch_refused_on_card(tmp_path):
    d = tmp_path / "s"
    study_keygen(d, "harbour-days-2027", PASS, scrypt_n=FAST_N)
    text = bundled_policy_path("default").read_text().replace('key_fingerprint = ""',
                                                              'key_fingerprint = "' + "a" * 64 + '"')
    pinned = tmp_path / "pinned.toml"
    pinned.write_text(text)
    with pytest.raises(StateError, match="pins key"):
        write_card(d, [pinned], "desk", tmp_path / "card.json")


def test_enrolment_roundtrip_and_registry(study, tmp_path):
    d, path = study
    card = load_card(path)
    pol = load_policy(bundled_policy_path("default"))
    key = Ed25519PrivateKey.generate()
    doc = make_enrolment(card, pol, "pX7QmN2a", key)
    f = tmp_path / "enrol.json"
    f.write_text(json.dumps(doc))
    dev = enroll(d, f)
    assert dev.pseudonym == "pX7QmN2a"
    assert Registry.load(d).by_key_id(doc["device_key_id"]).pseudonym == "pX7QmN2a"
    assert load_enrolment(f)["policy_fingerprint"] == pol.fingerprint


def test_enrolment_forged_signature(study):
    _, path = study
    card = load_card(path)
    pol = load_policy(bundled_policy_path("default"))
    doc = make_enrolment(card, pol, "pX7QmN2a", Ed25519PrivateKey.generate())
    doc["pseudonym"] = "someone-else"
    with pytest.raises(IntegrityError, match="not signed by the device key"):
        verify_enrolment(doc)


def test_enrolment_refused_for_unapproved_policy(study):
    _, path = study
    card = load_card(path)
    with pytest.raises(StateError, match="not approved"):
        make_enrolment(card, load_policy(bundled_policy_path("strict")), "pX7QmN2a",
                       Ed25519PrivateKey.generate())


def test_second_key_for_pseudonym_refused(study, tmp_path):
    d, path = study
    card = load_card(path)
    pol = load_policy(bundled_policy_path("default"))
    for i in range(2):
        f = tmp_path / f"e{i}.json"
        f.write_text(json.dumps(make_enrolment(card, pol, "pX7QmN2a", Ed25519PrivateKey.generate())))
        if i == 0:
            enroll(d, f)
    with pytest.raises(StateError, match="already enrolled"):
        enroll(d, f)


def _enrolled(study, tmp_path):
    d, path = study
    card = load_card(path)
    key = Ed25519PrivateKey.generate()
    f = tmp_path / "e.json"
    f.write_text(json.dumps(make_enrolment(card, load_policy(bundled_policy_path("default")), "pX7QmN2a", key)))
    enroll(d, f)
    return d, key


def test_withdrawal_verifies(study, tmp_path):
    d, key = _enrolled(study, tmp_path)
    cert = make_withdrawal_certificate("harbour-days-2027", "pX7QmN2a", key, {"seq": 41, "hash": "ab" * 32},
                                       {"episodes": 168, "answers": 20}, now=1764626400.0)
    assert cert["time"] == "2025-12-01T22:00Z"
    check = verify_withdrawal(cert, Registry.load(d))
    assert check.counts_destroyed == {"answers": 20, "episodes": 168}
    verify_withdrawal_signature(cert, key.public_key())


def test_withdrawal_altered_count(study, tmp_path):
    d, key = _enrolled(study, tmp_path)
    cert = make_withdrawal_certificate("harbour-days-2027", "pX7QmN2a", key, {"seq": 41, "hash": "ab" * 32},
                                       {"episodes": 168})
    cert["counts_destroyed"]["episodes"] = 1
    with pytest.raises(IntegrityError, match="signature does not verify"):
        verify_withdrawal(cert, Registry.load(d))


def test_withdrawal_by_other_device(study, tmp_path):
    d, _ = _enrolled(study, tmp_path)
    cert = make_withdrawal_certificate("harbour-days-2027", "pX7QmN2a", Ed25519PrivateKey.generate(),
                                       {"seq": 1, "hash": "ab"}, {})
    with pytest.raises(IntegrityError, match="not the expected device key"):
        verify_withdrawal(cert, Registry.load(d))


def test_withdrawal_unknown_pseudonym(study, tmp_path):
    d, key = _enrolled(study, tmp_path)
    cert = make_withdrawal_certificate("harbour-days-2027", "nobody-here", key, {"seq": 1, "hash": "ab"}, {})
    with pytest.raises(StateError, match="not enrolled"):
        verify_withdrawal(cert, Registry.load(d))


def test_verify_withdrawal_cli_records_it(study, tmp_path, capsys):
    from agent.cli import main
    from agent.study.withdrawal import write_withdrawal_certificate

    d, key = _enrolled(study, tmp_path)
    cert = make_withdrawal_certificate("harbour-days-2027", "pX7QmN2a", key, {"seq": 7, "hash": "cd" * 32},
                                       {"episodes": 3})
    f = write_withdrawal_certificate(tmp_path / "w.json", cert)
    assert main(["study", "verify-withdrawal", "--dir", str(d), str(f)]) == 0
    assert "valid withdrawal of pX7QmN2a" in capsys.readouterr().out
    assert Registry.load(d).device("pX7QmN2a").withdrawn == cert["time"]


def test_verify_withdrawal_cli_tampered_exit_code(study, tmp_path):
    from agent.cli import main
    from agent.errors import EXIT_INTEGRITY
    from agent.study.withdrawal import write_withdrawal_certificate

    d, key = _enrolled(study, tmp_path)
    cert = make_withdrawal_certificate("harbour-days-2027", "pX7QmN2a", key, {"seq": 7, "hash": "cd" * 32}, {})
    cert["ledger_head"]["seq"] = 8
    f = write_withdrawal_certificate(tmp_path / "w.json", cert)
    assert main(["study", "verify-withdrawal", "--dir", str(d), str(f)]) == EXIT_INTEGRITY
    assert Registry.load(d).device("pX7QmN2a").withdrawn is None


def test_passphrase_from_file_drops_newline(tmp_path, monkeypatch):
    from agent.study.keys import read_passphrase

    monkeypatch.setenv("LETHE_STUDY_PASSPHRASE", "from the environment")
    f = tmp_path / "p"
    f.write_bytes(b"from the file\n")
    assert read_passphrase(str(f)) == b"from the file"  # the file wins over the environment


def test_passphrase_from_environment(monkeypatch):
    from agent.study.keys import read_passphrase

    monkeypatch.setenv("LETHE_STUDY_PASSPHRASE", "from the environment")
    assert read_passphrase(None) == b"from the environment"


def test_passphrase_never_prompted_without_terminal(monkeypatch):
    import io

    from agent.errors import UsageError
    from agent.study.keys import read_passphrase

    monkeypatch.delenv("LETHE_STUDY_PASSPHRASE", raising=False)
    monkeypatch.setattr("sys.stdin", io.StringIO(""))
    with pytest.raises(UsageError, match="no passphrase"):
        read_passphrase(None)


def test_short_passphrase_refused(tmp_path):
    from agent.errors import UsageError

    with pytest.raises(UsageError, match="at least 8 bytes"):
        study_keygen(tmp_path / "s", "x-study", b"short", scrypt_n=FAST_N)


def test_keygen_cli_pq_with_card(tmp_path, monkeypatch, capsys):
    from agent.cli import main

    monkeypatch.setenv("LETHE_STUDY_PASSPHRASE", PASS.decode())
    d = tmp_path / "s"
    monkeypatch.setattr("agent.study.keys.SCRYPT_N", FAST_N)
    rc = main(["study", "keygen", "--study-id", "harbour-days-2027", "--dir", str(d), "--suite", "pq",
               "--policy", str(bundled_policy_path("default")), "--json"])
    assert rc == 0
    out = json.loads(capsys.readouterr().out)
    card = load_card(out["card"])
    assert card.suite == "pq" and len(card.public_key) == 1216 and card.key_fingerprint == out["key_fingerprint"]


def test_default_scrypt_cost_is_recorded(tmp_path):
    from agent.study.keys import SCRYPT_N

    study_keygen(tmp_path / "s", "x-study", PASS)
    doc = json.loads((tmp_path / "s" / "keys" / "study.key").read_text())
    assert doc["kdf"] == {**doc["kdf"], "name": "scrypt", "n": SCRYPT_N, "r": 8, "p": 1}
    assert SCRYPT_N == 2**18
