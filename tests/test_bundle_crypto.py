"""The primitives under the bundle, checked against published vectors and an independent implementation.

* RFC 9180 appendix A.1 (DHKEM(X25519, HKDF-SHA256), HKDF-SHA256, AES-128-GCM, mode_base),
  loaded from the cryptography_vectors package's HPKE/test-vectors.json.
* RFC 8032 section 7.1 Ed25519 vectors, from cryptography_vectors asymmetric/Ed25519/sign.input.
* Interoperability of our HPKE seal (``cryptography``) with the independent ``pyhpke``
  package, both ways, with the bundle header as ``info``.
"""

from __future__ import annotations

import json
from pathlib import Path

import cryptography_vectors
import pyhpke
import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from cryptography.hazmat.primitives.asymmetric.x25519 import X25519PrivateKey
from pyhpke import AEADId, CipherSuite, KDFId, KEMId

from agent.bundle import split_bundle
from agent.hpke_suites import enc_length, suite_of

from _bundle_fixtures import Study

VECTORS = Path(cryptography_vectors.__file__).parent


def rfc9180_a1():
    data = json.loads((VECTORS / "HPKE" / "test-vectors.json").read_text())
    matches = [v for v in data if v["mode"] == 0 and v["kem_id"] == 32 and v["kdf_id"] == 1 and v["aead_id"] == 1]
    assert len(matches) == 1
    return matches[0]


def pyhpke_suite():
    return CipherSuite.new(KEMId.DHKEM_X25519_HKDF_SHA256, KDFId.HKDF_SHA256, AEADId.AES128_GCM)


def test_rfc9180_a1_pyhpke_seal_matches_vector():
    # RFC 9180 appendix A.1.1, via cryptography_vectors: the ephemeral key pair derived
    # from ikmE gives enc, and sealing each plaintext gives the listed ciphertexts.
    v = rfc9180_a1()
    s = pyhpke_suite()
    eks = s.kem.derive_key_pair(bytes.fromhex(v["ikmE"]))
    pkr = s.kem.deserialize_public_key(bytes.fromhex(v["pkRm"]))
    enc, ctx = s.create_sender_context(pkr, bytes.fromhex(v["info"]), eks=eks)
    assert enc.hex() == v["enc"] == v["pkEm"]
    for e in v["encryptions"][:4]:
        assert ctx.seal(bytes.fromhex(e["pt"]), bytes.fromhex(e["aad"])).hex() == e["ct"]


def test_rfc9180_a1_pyhpke_open_vector():
    # RFC 9180 appendix A.1.1: the recipient opens the listed ciphertexts in order.
    v = rfc9180_a1()
    s = pyhpke_suite()
    skr = s.kem.deserialize_private_key(bytes.fromhex(v["skRm"]))
    ctx = s.create_recipient_context(bytes.fromhex(v["enc"]), skr, bytes.fromhex(v["info"]))
    for e in v["encryptions"][:4]:
        assert ctx.open(bytes.fromhex(e["ct"]), bytes.fromhex(e["aad"])).hex() == e["pt"]


def test_rfc9180_a1_keys_agree_with_cryptography():
    # RFC 9180 appendix A.1.1: skRm and pkRm are an X25519 pair (checked with `cryptography`).
    v = rfc9180_a1()
    sk = X25519PrivateKey.from_private_bytes(bytes.fromhex(v["skRm"]))
    assert sk.public_key().public_bytes_raw().hex() == v["pkRm"]


def test_rfc9180_a1_cryptography_opens_first_vector_message_when_aad_empty():
    # `cryptography`'s single-shot API has no aad argument (aad = empty), and the A.1
    # messages all carry an aad, so it cannot reproduce them directly.  Instead pyhpke,
    # keyed exactly as in A.1 (same ephemeral key, same info), seals with aad = empty,
    # and `cryptography` must open it with the A.1 recipient key.
    v = rfc9180_a1()
    s = pyhpke_suite()
    eks = s.kem.derive_key_pair(bytes.fromhex(v["ikmE"]))
    pkr = s.kem.deserialize_public_key(bytes.fromhex(v["pkRm"]))
    enc, ctx = s.create_sender_context(pkr, bytes.fromhex(v["info"]), eks=eks)
    pt = bytes.fromhex(v["encryptions"][0]["pt"])
    ct = ctx.seal(pt, b"")
    sk = X25519PrivateKey.from_private_bytes(bytes.fromhex(v["skRm"]))
    assert suite_of("default").decrypt(enc + ct, sk, info=bytes.fromhex(v["info"])) == pt


def test_interop_cryptography_seals_pyhpke_opens(tmp_path):
    # Our bundle (sealed by `cryptography`) opened by the independent pyhpke implementation.
    study = Study(tmp_path)
    parts = split_bundle(study.seal())
    key = study.key()
    s = pyhpke_suite()
    skr = s.kem.deserialize_private_key(key.private_bytes)
    ctx = s.create_recipient_context(parts.enc, skr, parts.header_bytes)
    payload = json.loads(ctx.open(parts.ciphertext, b""))
    assert payload["study_id"] == "harbour-days-2027"


def test_interop_pyhpke_seals_cryptography_opens():
    sk = X25519PrivateKey.generate()
    s = pyhpke_suite()
    pkr = s.kem.deserialize_public_key(sk.public_key().public_bytes_raw())
    info = b'{"format":"lethe-bundle"}'
    enc, ctx = s.create_sender_context(pkr, info)
    ct = ctx.seal(b"sealed by pyhpke", b"")
    assert len(enc) == enc_length("default")
    assert suite_of("default").decrypt(enc + ct, sk, info=info) == b"sealed by pyhpke"


def test_interop_wrong_info_fails_in_both():
    from cryptography.exceptions import InvalidTag

    sk = X25519PrivateKey.generate()
    sealed = suite_of("default").encrypt(b"x", sk.public_key(), info=b"header A")
    with pytest.raises(InvalidTag):
        suite_of("default").decrypt(sealed, sk, info=b"header B")
    s = pyhpke_suite()
    ctx = s.create_recipient_context(sealed[:32], s.kem.deserialize_private_key(sk.private_bytes_raw()), b"header B")
    with pytest.raises(pyhpke.OpenError):
        ctx.open(sealed[32:], b"")


def rfc8032_vectors():
    rows = []
    for line in (VECTORS / "asymmetric" / "Ed25519" / "sign.input").read_text().splitlines():
        if not line.strip():
            continue
        sk_pk, pk, msg, sig_msg, _ = line.split(":")
        rows.append((bytes.fromhex(sk_pk[:64]), bytes.fromhex(pk), bytes.fromhex(msg), bytes.fromhex(sig_msg[:128])))
    return rows


def test_rfc8032_section_7_1_test_1():
    # RFC 8032 section 7.1, TEST 1 (empty message) is the first line of sign.input.
    sk, pk, msg, sig = rfc8032_vectors()[0]
    assert msg == b""
    key = Ed25519PrivateKey.from_private_bytes(sk)
    assert key.public_key().public_bytes_raw() == pk
    assert key.sign(msg) == sig


def test_bundle_signature_is_plain_ed25519_over_prefix(tmp_path):
    # The bundle's last 64 bytes are an RFC 8032 signature over every byte before them.
    study = Study(tmp_path)
    data = study.seal()
    study.device.public_key().verify(data[-64:], data[:-64])


def test_pq_public_key_layout_matches_xwing_vector():
    # cryptography_vectors HPKE/hpke-pq-test-vectors.json, KEM 0x647a (MLKEM768-X25519).
    # The 32-byte private seed expands with SHAKE256 to 96 bytes: the ML-KEM-768 seed (64)
    # then the X25519 scalar (32) -- that expansion rule is from memory; the vector's pkRm
    # confirms it, and with it our public-key layout (ML-KEM key || X25519 key, 1216 bytes).
    import hashlib

    from agent.hpke_suites import public_key_object
    from agent.study.keys import _public_from_private

    data = json.loads((VECTORS / "HPKE" / "hpke-pq-test-vectors.json").read_text())
    v = next(x for x in data if x["kem_id"] == 0x647A)
    expanded = hashlib.shake_256(bytes.fromhex(v["skRm"])).digest(96)
    assert _public_from_private("pq", expanded).hex() == v["pkRm"]
    public_key_object("pq", bytes.fromhex(v["pkRm"]))  # our loader accepts the standard encoding
