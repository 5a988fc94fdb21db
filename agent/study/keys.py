"""The study's HPKE key pair and its passphrase-protected private key file.

The suites (``default``, ``pq``) and their key layouts are in
:mod:`agent.hpke_suites`, which the device's bundle code shares.

``STUDYDIR/keys/study.key`` (0600) is a JSON document ("lethe-study-key" v1)
whose private bytes are sealed with AES-256-GCM under a key derived from the
passphrase with scrypt (RFC 7914).  Every other field of the document is the
AEAD's associated data, so editing the suite, the salt or the public key makes
the file fail to open.  ``STUDYDIR/keys/study.pub`` holds the public half as
JSON too, readable without the passphrase.
"""

from __future__ import annotations

import base64
import json
import os
from dataclasses import dataclass
from pathlib import Path

from ..errors import DataError, IntegrityError, StateError, UsageError
from ..fsutil import DIR_MODE, write_private
from ..hpke_suites import PRIVATE_KEY_BYTES, PUBLIC_KEY_BYTES, SUITES, key_fingerprint, public_key_object
from ..canonical import dumps as canonical_json

KEY_FORMAT = "lethe-study-key"
PUB_FORMAT = "lethe-study-public-key"
KEY_VERSION = 1

# scrypt cost.  The scheme's author suggested N = 2^14 (r = 8, p = 1) for
# interactive logins and N = 2^20 for sensitive storage (2009 slides, as quoted
# in the answers to "What are optimal scrypt work factors?" on Stack Overflow).
# The study key is opened rarely, on a researcher's laptop: N = 2^18 costs
# 256 MiB and about 0.6 s on our 2-core test machine, a compromise between the two.
SCRYPT_N = 2**18
SCRYPT_R = 8
SCRYPT_P = 1
SALT_BYTES = 16

ENV_PASSPHRASE = "LETHE_STUDY_PASSPHRASE"


def b64e(data: bytes) -> str:
    return base64.b64encode(data).decode("ascii")


def b64d(text, *, what: str, source) -> bytes:
    if not isinstance(text, str):
        raise DataError(f"{source}: [{what}] expected base64 text, got {type(text).__name__}")
    try:
        return base64.b64decode(text.encode("ascii"), validate=True)
    except (ValueError, UnicodeEncodeError):
        raise DataError(f"{source}: [{what}] is not valid base64") from None


def _private_key_object(suite: str, private_bytes: bytes):
    from cryptography.hazmat.primitives.asymmetric.x25519 import X25519PrivateKey

    if suite == "default":
        return X25519PrivateKey.from_private_bytes(private_bytes)
    from cryptography.hazmat.primitives import hpke
    from cryptography.hazmat.primitives.asymmetric import mlkem

    return hpke.MLKEM768X25519PrivateKey(
        mlkem.MLKEM768PrivateKey.from_seed_bytes(private_bytes[:64]),
        X25519PrivateKey.from_private_bytes(private_bytes[64:]))


@dataclass
class StudyKeyPair:
    """A study key pair held in memory.

    Attributes
    ----------
    study_id : str
    suite : str
        ``"default"`` or ``"pq"``.
    public_bytes : bytes
        Raw public key (layout per suite, see module docstring).
    private_bytes : bytes
        Raw private key: the X25519 scalar, or for ``pq`` the 64-byte
        ML-KEM-768 seed followed by the X25519 scalar.
    """

    study_id: str
    suite: str
    public_bytes: bytes
    private_bytes: bytes

    @classmethod
    def generate(cls, study_id: str, suite: str = "default") -> StudyKeyPair:
        from cryptography.hazmat.primitives.asymmetric.x25519 import X25519PrivateKey

        if suite not in SUITES:
            raise UsageError(f"unknown suite {suite!r}; expected one of {', '.join(SUITES)}")
        _check_study_id(study_id, "<keygen>")
        x = X25519PrivateKey.generate()
        x_priv, x_pub = x.private_bytes_raw(), x.public_key().public_bytes_raw()
        if suite == "default":
            return cls(study_id, suite, x_pub, x_priv)
        from cryptography.hazmat.primitives.asymmetric import mlkem

        m = mlkem.MLKEM768PrivateKey.generate()
        return cls(study_id, suite, m.public_key().public_bytes_raw() + x_pub,
                   m.private_bytes_raw() + x_priv)

    @property
    def fingerprint(self) -> str:
        return key_fingerprint(self.public_bytes)

    def public_key(self):
        return public_key_object(self.suite, self.public_bytes)

    def private_key(self):
        return _private_key_object(self.suite, self.private_bytes)


def _check_study_id(study_id, source) -> None:
    ok = isinstance(study_id, str) and 0 < len(study_id) <= 64 and all(
        c.isascii() and (c.isalnum() or c in "-_.") for c in study_id)
    if not ok:
        raise DataError(f"{source}: [study_id] {study_id!r} must be 1-64 ASCII letters, digits, '-', '_' or '.'")


def _kek(passphrase: bytes, salt: bytes, n: int, r: int, p: int) -> bytes:
    from cryptography.hazmat.primitives.kdf.scrypt import Scrypt

    return Scrypt(salt=salt, length=32, n=n, r=r, p=p).derive(passphrase)


def encrypt_private_key(pair: StudyKeyPair, passphrase: bytes, *, scrypt_n: int | None = None) -> dict:
    """The "lethe-study-key" v1 document for ``pair`` (private bytes sealed)."""
    from cryptography.hazmat.primitives.ciphers.aead import AESGCM

    scrypt_n = SCRYPT_N if scrypt_n is None else scrypt_n
    if not isinstance(passphrase, (bytes, bytearray)) or len(passphrase) < 8:
        raise UsageError("the study key passphrase must be at least 8 bytes long")
    if scrypt_n < 2 or scrypt_n & (scrypt_n - 1):
        raise UsageError(f"scrypt_n must be a power of two >= 2, got {scrypt_n}")
    salt, nonce = os.urandom(SALT_BYTES), os.urandom(12)
    doc = {
        "format": KEY_FORMAT, "version": KEY_VERSION, "study_id": pair.study_id, "suite": pair.suite,
        "public_key": b64e(pair.public_bytes), "key_fingerprint": pair.fingerprint,
        "kdf": {"name": "scrypt", "n": scrypt_n, "r": SCRYPT_R, "p": SCRYPT_P, "salt": b64e(salt)},
        "aead": "AES-256-GCM", "nonce": b64e(nonce),
    }
    kek = _kek(bytes(passphrase), salt, scrypt_n, SCRYPT_R, SCRYPT_P)
    doc["ciphertext"] = b64e(AESGCM(kek).encrypt(nonce, pair.private_bytes, canonical_json(doc)))
    return doc


def decrypt_private_key(doc: dict, passphrase: bytes, source="<study key>") -> StudyKeyPair:
    """Open a "lethe-study-key" document; wrong passphrase or edits -> IntegrityError."""
    from cryptography.exceptions import InvalidTag
    from cryptography.hazmat.primitives.ciphers.aead import AESGCM

    if not isinstance(doc, dict) or doc.get("format") != KEY_FORMAT:
        fmt = doc.get("format") if isinstance(doc, dict) else None
        raise DataError(f"{source}: not a lethe study key file (format {fmt!r})")
    if doc.get("version") != KEY_VERSION:
        raise DataError(f"{source}: study key file version {doc.get('version')!r} is not supported "
                        f"(this lethe reads version {KEY_VERSION})")
    expected = {"format", "version", "study_id", "suite", "public_key", "key_fingerprint", "kdf",
                "aead", "nonce", "ciphertext"}
    if set(doc) != expected:
        raise DataError(f"{source}: study key file fields {sorted(set(doc) ^ expected)} are unexpected or missing")
    kdf = doc["kdf"]
    if (not isinstance(kdf, dict) or kdf.get("name") != "scrypt" or set(kdf) != {"name", "n", "r", "p", "salt"}
            or not all(isinstance(kdf[k], int) and not isinstance(kdf[k], bool) for k in ("n", "r", "p"))):
        raise DataError(f"{source}: [kdf] expected scrypt with integer n, r, p and a salt")
    if doc["aead"] != "AES-256-GCM" or doc["suite"] not in SUITES:
        raise DataError(f"{source}: [aead/suite] unsupported {doc['aead']!r}/{doc['suite']!r}")
    # Refuse absurd costs before spending memory on them (a hostile file could ask for terabytes).
    if not (2 <= kdf["n"] <= 2**22 and 1 <= kdf["r"] <= 32 and 1 <= kdf["p"] <= 16):
        raise DataError(f"{source}: [kdf] scrypt parameters n={kdf['n']} r={kdf['r']} p={kdf['p']} out of range")
    salt = b64d(kdf["salt"], what="kdf.salt", source=source)
    nonce = b64d(doc["nonce"], what="nonce", source=source)
    ct = b64d(doc["ciphertext"], what="ciphertext", source=source)
    public = b64d(doc["public_key"], what="public_key", source=source)
    aad = canonical_json({k: v for k, v in doc.items() if k != "ciphertext"})
    kek = _kek(bytes(passphrase), salt, kdf["n"], kdf["r"], kdf["p"])
    try:
        private = AESGCM(kek).decrypt(nonce, ct, aad)
    except InvalidTag:
        raise IntegrityError(f"{source}: cannot open the study key: wrong passphrase, "
                             f"or the file was altered") from None
    pair = StudyKeyPair(doc["study_id"], doc["suite"], public, private)
    if len(private) != PRIVATE_KEY_BYTES[pair.suite]:
        raise IntegrityError(f"{source}: decrypted private key has the wrong length")
    # The public key must be the one the private key implies.
    derived = _public_from_private(pair.suite, private)
    if derived != public or key_fingerprint(public) != doc["key_fingerprint"]:
        raise IntegrityError(f"{source}: the public key in the file does not belong to its private key")
    return pair


def _public_from_private(suite: str, private: bytes) -> bytes:
    from cryptography.hazmat.primitives.asymmetric.x25519 import X25519PrivateKey

    if suite == "default":
        return X25519PrivateKey.from_private_bytes(private).public_key().public_bytes_raw()
    from cryptography.hazmat.primitives.asymmetric import mlkem

    m = mlkem.MLKEM768PrivateKey.from_seed_bytes(private[:64])
    return (m.public_key().public_bytes_raw()
            + X25519PrivateKey.from_private_bytes(private[64:]).public_key().public_bytes_raw())


# -- the study directory ---------------------------------------------------

def key_path(study_dir) -> Path:
    return Path(study_dir) / "keys" / "study.key"


def pub_path(study_dir) -> Path:
    return Path(study_dir) / "keys" / "study.pub"


def study_keygen(study_dir, study_id: str, passphrase: bytes | str, suite: str = "default", *,
                 scrypt_n: int | None = None, overwrite: bool = False) -> StudyKeyPair:
    """Create the study key pair in ``STUDYDIR/keys/`` (study.key 0600, study.pub).

    Parameters
    ----------
    study_dir : path-like
        The researcher's study directory (created if missing, mode 0700).
    study_id : str
        The study identifier (must match the policies' ``[study].study_id``).
    passphrase : bytes or str
        Protects the private key; at least 8 bytes.
    suite : {"default", "pq"}
    scrypt_n : int, optional
        scrypt cost parameter (power of two); default :data:`SCRYPT_N`.  Lower only in tests.
    overwrite : bool
        Refuse to replace an existing key unless True (a lost study key makes
        every bundle sealed to it unreadable).
    """
    if isinstance(passphrase, str):
        passphrase = passphrase.encode("utf-8")
    study_dir = Path(study_dir)
    if key_path(study_dir).exists() and not overwrite:
        raise StateError(f"{key_path(study_dir)}: a study key already exists; refusing to replace it "
                         f"(bundles sealed to it would become unreadable)")
    pair = StudyKeyPair.generate(study_id, suite)
    doc = encrypt_private_key(pair, passphrase, scrypt_n=SCRYPT_N if scrypt_n is None else scrypt_n)
    study_dir.mkdir(parents=True, exist_ok=True, mode=DIR_MODE)
    write_private(key_path(study_dir), (json.dumps(doc, indent=2, sort_keys=True) + "\n").encode())
    pub = {"format": PUB_FORMAT, "version": KEY_VERSION, "study_id": study_id, "suite": suite,
           "public_key": b64e(pair.public_bytes), "key_fingerprint": pair.fingerprint}
    write_private(pub_path(study_dir), (json.dumps(pub, indent=2, sort_keys=True) + "\n").encode())
    os.chmod(pub_path(study_dir), 0o644)  # public half: readable by anyone
    return pair


def _read_key_file(p: Path, what: str) -> dict:
    try:
        return json.loads(p.read_text("utf-8"))
    except FileNotFoundError:
        raise StateError(f"{p}: no {what}; run 'lethe study keygen' first") from None
    except (ValueError, UnicodeDecodeError) as e:
        raise DataError(f"{p}: not valid JSON ({e})") from None


def load_public(study_dir) -> dict:
    """``{"study_id", "suite", "public_key" (bytes), "key_fingerprint"}`` from study.pub."""
    p = pub_path(study_dir)
    doc = _read_key_file(p, "study public key")
    if not isinstance(doc, dict) or doc.get("format") != PUB_FORMAT or doc.get("version") != KEY_VERSION:
        raise DataError(f"{p}: not a lethe study public key file (version {KEY_VERSION})")
    public = b64d(doc.get("public_key"), what="public_key", source=p)
    if doc.get("suite") not in SUITES or len(public) != PUBLIC_KEY_BYTES[doc["suite"]]:
        raise DataError(f"{p}: [suite/public_key] inconsistent suite {doc.get('suite')!r} and key length")
    if key_fingerprint(public) != doc.get("key_fingerprint"):
        raise IntegrityError(f"{p}: key_fingerprint does not match the public key")
    return {"study_id": doc["study_id"], "suite": doc["suite"], "public_key": public,
            "key_fingerprint": doc["key_fingerprint"]}


def load_study_key(study_dir, passphrase: bytes | str) -> StudyKeyPair:
    """Open ``STUDYDIR/keys/study.key`` with the passphrase."""
    if isinstance(passphrase, str):
        passphrase = passphrase.encode("utf-8")
    p = key_path(study_dir)
    doc = _read_key_file(p, "study key")
    return decrypt_private_key(doc, passphrase, source=p)


def read_passphrase(passphrase_file=None, *, confirm: bool = False) -> bytes:
    """The passphrase from a file, ``LETHE_STUDY_PASSPHRASE``, or an interactive prompt.

    Never from the command line (it would show in the process list and shell history).
    A trailing newline in the file is dropped.
    """
    if passphrase_file:
        try:
            data = Path(passphrase_file).read_bytes()
        except OSError as e:
            raise UsageError(f"{passphrase_file}: cannot read the passphrase file: {e.strerror}") from None
        return data.rstrip(b"\r\n")
    env = os.environ.get(ENV_PASSPHRASE)
    if env:
        return env.encode("utf-8")
    import getpass
    import sys

    if not sys.stdin.isatty():
        raise UsageError("no passphrase: give --passphrase-file or set LETHE_STUDY_PASSPHRASE "
                         "(standard input is not a terminal)")
    first = getpass.getpass("Study key passphrase: ")
    if confirm and getpass.getpass("Repeat the passphrase: ") != first:
        raise UsageError("the two passphrases differ")
    return first.encode("utf-8")
