"""The HPKE suites of bundles and study cards: one table that both sides share.

The device seals bundles with it (:mod:`agent.bundle`), the researcher's side
makes keys and cards and opens bundles with it (:mod:`agent.study`); it imports
neither side.  Two suites are offered (``docs/bundle-format.md``, section "Suites"):

``default``
    RFC 9180 DHKEM(X25519, HKDF-SHA256), HKDF-SHA256, AES-128-GCM.
    Public key: the 32 raw X25519 bytes.
``pq``
    The hybrid ML-KEM-768 + X25519 KEM of ``cryptography`` (for data that
    must resist a later quantum attack), HKDF-SHA256, AES-128-GCM.
    Public key: the 1184-byte ML-KEM-768 encapsulation key followed by the
    32 X25519 bytes (1216 bytes, the standard encoding of HPKE KEM 0x647A).
"""

from __future__ import annotations

import hashlib

from .errors import DataError, UsageError

#: Suite short name -> RFC 9180-style names written on cards and bundle headers.
SUITES = {
    "default": {"kem": "DHKEM(X25519, HKDF-SHA256)", "kdf": "HKDF-SHA256", "aead": "AES-128-GCM"},
    "pq": {"kem": "MLKEM768-X25519", "kdf": "HKDF-SHA256", "aead": "AES-128-GCM"},
}
PUBLIC_KEY_BYTES = {"default": 32, "pq": 1184 + 32}
PRIVATE_KEY_BYTES = {"default": 32, "pq": 64 + 32}
#: Length in bytes of the HPKE encapsulated key per suite.
ENC_BYTES = {"default": 32, "pq": 1088 + 32}


def key_fingerprint(public_bytes: bytes) -> str:
    """SHA-256 hex of the raw public key bytes (what cards and headers carry)."""
    return hashlib.sha256(public_bytes).hexdigest()


def suite_of(name: str):
    """The ``cryptography`` HPKE suite object for a suite short name."""
    from cryptography.hazmat.primitives import hpke

    if name == "default":
        return hpke.Suite(hpke.KEM.X25519, hpke.KDF.HKDF_SHA256, hpke.AEAD.AES_128_GCM)
    if name == "pq":
        return hpke.Suite(hpke.KEM.MLKEM768_X25519, hpke.KDF.HKDF_SHA256, hpke.AEAD.AES_128_GCM)
    raise UsageError(f"unknown suite {name!r}; expected one of {', '.join(SUITES)}")


def enc_length(name: str) -> int:
    """Length in bytes of the HPKE encapsulated key for a suite."""
    if name not in ENC_BYTES:
        raise UsageError(f"unknown suite {name!r}; expected one of {', '.join(SUITES)}")
    return ENC_BYTES[name]


def public_key_object(suite: str, public_bytes: bytes):
    """Rebuild the ``cryptography`` public key object from its raw bytes."""
    from cryptography.hazmat.primitives.asymmetric.x25519 import X25519PublicKey

    if len(public_bytes) != PUBLIC_KEY_BYTES.get(suite, -1):
        raise DataError(f"a {suite!r} public key has {PUBLIC_KEY_BYTES.get(suite)} bytes, "
                        f"got {len(public_bytes)}")
    if suite == "default":
        return X25519PublicKey.from_public_bytes(public_bytes)
    from cryptography.hazmat.primitives import hpke
    from cryptography.hazmat.primitives.asymmetric import mlkem

    return hpke.MLKEM768X25519PublicKey(
        mlkem.MLKEM768PublicKey.from_public_bytes(public_bytes[:1184]),
        X25519PublicKey.from_public_bytes(public_bytes[1184:]))
