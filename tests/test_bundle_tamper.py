"""Every way a bundle can be wrong is refused with its own message, and nothing is written.

Each case is its own test.  The expected messages are the reader's contract
(``docs/bundle-format.md``, "Reading a bundle").
"""

from __future__ import annotations

import json
import struct

import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from cryptography.hazmat.primitives.asymmetric.x25519 import X25519PrivateKey

from agent.bundle import MAGIC, FormatVersionError
from agent.errors import EXIT_DATA, EXIT_INTEGRITY, EXIT_STATE, DataError, IntegrityError, StateError
from agent.canonical import dumps as canonical_json
from agent.policy import bundled_policy_path, load_policy
from agent.study.open import open_bundles
from agent.study.registry import Registry

from _bundle_fixtures import PASS, Study, make_payload


@pytest.fixture
def study(tmp_path):
    return Study(tmp_path)


def snapshot(study):
    """Every file under the study directory with its bytes (to prove nothing was written)."""
    return {p: p.read_bytes() for p in sorted(study.dir.rglob("*")) if p.is_file() and p.name != "registry.lock"}


def refuse(study, data, exc, match):
    before = snapshot(study)
    with pytest.raises(exc, match=match) as e:
        open_bundles(study.dir, [study.write(data)], PASS)
    assert snapshot(study) == before
    return e.value


def header_range(data):
    (h_len,) = struct.unpack(">I", data[10:14])
    return 14, 14 + h_len


def ct_range(data):
    _, h_end = header_range(data)
    (e_len,) = struct.unpack(">H", data[h_end:h_end + 2])
    c0 = h_end + 2 + e_len + 4
    (c_len,) = struct.unpack(">I", data[c0 - 4:c0])
    return c0, c0 + c_len


def flip(data, i):
    b = bytearray(data)
    b[i] ^= 0x01
    return bytes(b)


def test_good_bundle_opens_and_is_stored(study):
    res = open_bundles(study.dir, [study.write(study.seal())], PASS)
    stored = json.loads((study.dir / "received" / study.pseudonym / "1.json").read_text())
    assert res[0].ok and stored["header"]["seq"] == 1
    assert stored["payload"]["ledger_digest"]["head"]["seq"] == 42


def test_flipped_byte_in_header(study):
    data = study.seal()
    h0, _ = header_range(data)
    text = data[h0:h0 + 400]
    i = h0 + text.index(b"harbour-days")  # inside the study id value: the JSON still parses
    e = refuse(study, flip(data, i), IntegrityError, "signature does not verify against enrolled device")
    assert e.exit_code == EXIT_INTEGRITY


def test_flipped_header_brace_breaks_json(study):
    data = study.seal()
    h0, _ = header_range(data)
    refuse(study, flip(data, h0), IntegrityError, "signature does not verify against any enrolled device")


def test_flipped_byte_in_ciphertext(study):
    data = study.seal()
    c0, c1 = ct_range(data)
    refuse(study, flip(data, (c0 + c1) // 2), IntegrityError, "Ed25519 signature does not verify")


def test_flipped_byte_in_signature(study):
    data = study.seal()
    refuse(study, flip(data, len(data) - 10), IntegrityError, "Ed25519 signature does not verify")


def test_truncated(study):
    data = study.seal()
    e = refuse(study, data[:-1], IntegrityError, "truncated bundle: signature needs 64 bytes")
    assert e.exit_code == EXIT_INTEGRITY


def test_truncated_in_header(study):
    refuse(study, study.seal()[:20], IntegrityError, "truncated bundle: header needs")


def test_trailing_bytes(study):
    refuse(study, study.seal() + b"\0", IntegrityError, "unexpected bytes after the signature")


def test_bad_magic(study):
    e = refuse(study, b"PK\x03\x04" + study.seal()[4:], DataError, "bad magic")
    assert e.exit_code == EXIT_DATA


def test_future_format_version(study):
    data = study.seal()
    future = data[:8] + struct.pack(">H", 2) + data[10:]
    e = refuse(study, future, FormatVersionError, "format version 2 is newer than this lethe reads")
    assert e.exit_code == EXIT_DATA


def test_wrong_study_key_header_names_other_key(study, tmp_path):
    other = Study(tmp_path / "other")
    # the same device enrolled in both studies, sealing to the other study's key
    data = other.seal(device=other.device)
    e = refuse(study, data, StateError, "signed by a device that is not enrolled")
    assert e.exit_code == EXIT_STATE


def test_sealed_to_another_key_under_our_header(study):
    # A signed bundle whose header names our key but whose ciphertext was sealed to
    # another key: the signature holds, the AEAD tag does not.
    wrong = X25519PrivateKey.generate().public_key()
    e = refuse(study, study.seal(recipient_key=wrong), IntegrityError, "AEAD tag does not verify")
    assert e.exit_code == EXIT_INTEGRITY


def test_header_names_another_recipient(study):
    data = study.seal(header_overrides={"recipient": "0" * 64})
    refuse(study, data, StateError, "not to this study's key")


def test_unenrolled_device(study):
    e = refuse(study, study.seal(device=Ed25519PrivateKey.generate()), StateError,
               "not enrolled in study 'harbour-days-2027'")
    assert e.exit_code == EXIT_STATE


def test_replayed_sequence_number(study):
    open_bundles(study.dir, [study.write(study.seal(seq=5), "a.lethe")], PASS)
    refuse(study, study.seal(seq=5), StateError, "replayed sequence number")


def test_duplicate_bundle(study):
    data = study.seal(seq=3)
    open_bundles(study.dir, [study.write(data, "a.lethe")], PASS)
    refuse(study, data, StateError, "duplicate: bundle #3")


def test_unapproved_policy(study):
    strict = load_policy(bundled_policy_path("strict"))
    payload = make_payload(strict)
    e = refuse(study, study.seal(payload=payload), StateError, "which the study card does not approve")
    assert strict.fingerprint in str(e)


def test_unknown_payload_field(study):
    payload = make_payload()
    payload["gps_track"] = [[38.7, -27.2]]
    e = refuse(study, study.seal(payload=payload), DataError, r"payload \[gps_track\] unknown field")
    assert e.exit_code == EXIT_DATA


def test_future_payload_schema(study):
    payload = make_payload()
    payload["schema"] = 3
    refuse(study, study.seal(payload=payload), DataError, "payload schema 3 is not supported")


def test_unknown_header_field(study):
    data = study.seal(header_overrides={"hostname": "laptop"})
    refuse(study, data, DataError, r"header \[hostname\] unknown field")


def test_wrong_passphrase_writes_nothing(study):
    data = study.seal()
    before = snapshot(study)
    with pytest.raises(IntegrityError, match="wrong passphrase"):
        open_bundles(study.dir, [study.write(data)], b"not the passphrase")
    assert snapshot(study) == before


def test_non_strict_reports_each(study):
    good, bad = study.seal(seq=1), flip(study.seal(seq=2), 20)
    res = open_bundles(study.dir, [study.write(good, "g.lethe"), study.write(bad, "x.lethe")], PASS, strict=False)
    assert [r.ok for r in res] == [True, False] and res[1].exit_code == EXIT_INTEGRITY
    assert Registry.load(study.dir).device(study.pseudonym).seen.keys() == {"1"}


def test_pq_suite_roundtrip(tmp_path):
    s = Study(tmp_path, suite="pq")
    res = open_bundles(s.dir, [s.write(s.seal())], PASS)
    assert res[0].ok


def test_header_is_canonical_json(study):
    data = study.seal()
    h0, h1 = header_range(data)
    assert data[:8] == MAGIC
    assert canonical_json(json.loads(data[h0:h1])) == data[h0:h1]


def test_withdrawn_participant(study):
    from agent.study.withdrawal import make_withdrawal_certificate, register_withdrawal, write_withdrawal_certificate

    data = study.seal()  # sealed before the withdrawal, arriving after it
    cert = make_withdrawal_certificate("harbour-days-2027", study.pseudonym, study.device,
                                       {"seq": 9, "hash": "ab" * 32}, {"episodes": 60})
    register_withdrawal(study.dir, write_withdrawal_certificate(study.tmp / "w.json", cert))
    refuse(study, data, StateError, "withdrew on")


# -- fail closed on any change -----------------------------------------------------
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402


@pytest.fixture(scope="module")
def sealed(tmp_path_factory):
    from agent.study.card import study_card

    from agent.bundle import read_bundle

    s = Study(tmp_path_factory.mktemp("fuzz"))
    good, reg, key, approved = s.seal(), Registry.load(s.dir), s.key(), study_card(s.dir).approved_policies
    read_bundle(good, registry=reg, study_key=key, approved_policies=approved)  # the original opens
    return s, good, reg, key, approved


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_any_flipped_bit_is_refused(sealed, data):
    from agent.bundle import read_bundle
    from agent.errors import LetheError

    _, good, reg, key, approved = sealed
    i = data.draw(st.integers(0, len(good) - 1))
    bit = data.draw(st.integers(0, 7))
    bad = bytearray(good)
    bad[i] ^= 1 << bit
    with pytest.raises(LetheError):
        read_bundle(bytes(bad), registry=reg, study_key=key, approved_policies=approved)


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_any_truncation_is_refused(sealed, data):
    from agent.bundle import read_bundle
    from agent.errors import LetheError

    _, good, reg, key, approved = sealed
    n = data.draw(st.integers(0, len(good) - 1))
    with pytest.raises(LetheError):
        read_bundle(good[:n], registry=reg, study_key=key, approved_policies=approved)
