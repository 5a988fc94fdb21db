"""Keys at rest: the vault key, the content-MAC key and the device signing key.

Terminology
-----------
vault key
    32 random bytes; the AES-256-GCM key that seals every vault record.
content key
    32 random bytes; the HMAC-SHA256 key for *content MACs*.  A content MAC
    identifies raw bytes (the same file always gets the same item id) without
    letting anyone who holds a recording confirm that it passed through this
    device, which a plain hash would.
device key
    An Ed25519 key pair that signs ledger entries and bundles.  The public half
    (``keys/device.pub``) is readable without the passphrase so an auditor can
    verify a copied home.
key-encryption key (KEK)
    With a passphrase, scrypt (n=2**15, r=8, p=1) turns it and a per-file salt
    into a 32-byte key that wraps the secret with AES-256-GCM.

Files (all 0600 in a 0700 directory, written atomically)::

    HOME/keys/vault.key       {"v":1,"name":"vault","store":"file"|"keyring","wrap":"none"|"scrypt-aesgcm",...}
    HOME/keys/content.key     same layout
    HOME/keys/device.ed25519  PKCS8 PEM; with a passphrase encrypted under hex(scrypt KEK)
    HOME/keys/device.ed25519.kdf  {"v":1,"kdf":{"n","r","p","salt"}} (only with a passphrase)
    HOME/keys/device.pub      64 hex digits: the raw Ed25519 public key, then a newline

The OS keyring (the optional ``keyring`` package) holds the vault and content
keys when it is importable, has a real backend and no passphrase is in use; the
key file then only records where the secret lives.  Details and the reasons for
the scrypt parameters are in ``docs/vault.md``.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import os
import re
from typing import Any
from pathlib import Path

from cryptography.exceptions import InvalidTag
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey
from cryptography.hazmat.primitives.ciphers.aead import AESGCM
from cryptography.hazmat.primitives.kdf.scrypt import Scrypt

from .errors import IntegrityError, StateError, UsageError
from .fsutil import DIR_MODE, write_private
from .identity import device_key_id  # noqa: F401  (re-exported: part of this module's contract)
from .home import Home, overwrite_and_unlink

KEY_BYTES = 32
KEYFILE_VERSION = 1

# scrypt cost: n=2**15, r=8 needs 128*r*n = 32 MiB and about 0.1 s on a laptop
# core, paid once per unlock.  That is the interactive setting commonly
# recommended (common practice, no single source); memory-hardness is the point
# of scrypt (RFC 7914), so r and p stay at their usual 8 and 1.
SCRYPT_N = 2 ** 15
SCRYPT_R = 8
SCRYPT_P = 1
SALT_BYTES = 16

KEYRING_SERVICE = "lethe"
VAULT_KEY_FILE = "vault.key"
CONTENT_KEY_FILE = "content.key"
DEVICE_KEY_FILE = "device.ed25519"
DEVICE_PUB_FILE = "device.pub"
DEVICE_KDF_FILE = "device.ed25519.kdf"


class PassphraseError(StateError):
    """The key files need a passphrase that was not given, or the one given is wrong."""


def content_mac(key: bytes, data: bytes) -> str:
    """Hex HMAC-SHA256 of ``data`` under ``key`` (RFC 2104 with SHA-256)."""
    if not isinstance(key, (bytes, bytearray)) or len(key) < 16:
        raise UsageError(f"content_mac: expected a key of at least 16 bytes, got {type(key).__name__}"
                         f"{'' if not isinstance(key, (bytes, bytearray)) else f' of {len(key)} bytes'}")
    return hmac.new(bytes(key), data, hashlib.sha256).hexdigest()


def derive_kek(passphrase: bytes, salt: bytes, *, n: int = SCRYPT_N, r: int = SCRYPT_R, p: int = SCRYPT_P,
               length: int = KEY_BYTES) -> bytes:
    """scrypt (RFC 7914) of a passphrase: the key-encryption key that wraps a secret."""
    return Scrypt(salt=salt, length=length, n=n, r=r, p=p).derive(passphrase)


def public_key_from(value) -> Ed25519PublicKey:
    """Accept an Ed25519PublicKey, raw 32 bytes, 64 hex digits or a PEM block."""
    if isinstance(value, Ed25519PublicKey):
        return value
    if isinstance(value, Ed25519PrivateKey):
        return value.public_key()
    if isinstance(value, (bytes, bytearray)) and len(value) == 32:
        return Ed25519PublicKey.from_public_bytes(bytes(value))
    if isinstance(value, (bytes, bytearray)):
        try:
            value = bytes(value).decode("ascii")
        except UnicodeDecodeError:
            value = None
    if isinstance(value, str):
        text = value.strip()
        if re.fullmatch(r"[0-9a-fA-F]{64}", text):
            return Ed25519PublicKey.from_public_bytes(bytes.fromhex(text))
        if text.startswith("-----BEGIN PUBLIC KEY-----"):
            try:
                key = serialization.load_pem_public_key(text.encode("ascii"))
            except ValueError:
                key = None
            if isinstance(key, Ed25519PublicKey):
                return key
    raise UsageError("expected an Ed25519 public key (object, 32 raw bytes, 64 hex digits or PEM)")


def read_device_public(keys_dir) -> Ed25519PublicKey:
    """Read ``device.pub`` from a keys directory (no passphrase needed)."""
    path = Path(keys_dir) / DEVICE_PUB_FILE
    try:
        text = path.read_text("ascii")
    except FileNotFoundError:
        raise StateError(f"{path}: no device public key here") from None
    try:
        return public_key_from(text)
    except (UsageError, ValueError):
        raise IntegrityError(f"{path}: not an Ed25519 public key (expected 64 hex digits)") from None


def _raw_public(public_key) -> bytes:
    if isinstance(public_key, (bytes, bytearray)) and len(public_key) == 32:
        return bytes(public_key)
    return public_key_from(public_key).public_bytes(serialization.Encoding.Raw,
                                                    serialization.PublicFormat.Raw)


def _as_passphrase(passphrase) -> bytes | None:
    if passphrase is None:
        return None
    if isinstance(passphrase, str):
        passphrase = passphrase.encode("utf-8")
    if not isinstance(passphrase, (bytes, bytearray)):
        raise UsageError(f"passphrase: expected bytes or str, got {type(passphrase).__name__}")
    if not passphrase:
        raise UsageError("passphrase: expected a non-empty passphrase (or None for none)")
    return bytes(passphrase)


def _keyring():
    """The keyring module when it is installed and has a usable backend, else None."""
    if os.environ.get("LETHE_NO_KEYRING"):
        return None
    try:
        import keyring
        import keyring.backends.fail
    except Exception:  # noqa: BLE001 - a broken install (or one removed on purpose) means "no keyring"
        return None
    try:
        backend = keyring.get_keyring()
        if isinstance(backend, keyring.backends.fail.Keyring) or backend.priority <= 0:
            return None
    except Exception:  # noqa: BLE001 - backends raise their own errors (D-Bus, locked collection)
        return None
    return keyring


KEY_STORAGES = ("keyring", "passphrase", "plain")
STORAGE_ENV = "LETHE_KEY_STORAGE"        # an explicit storage choice for scripts (and the test suite)
PASSPHRASE_ENV = "LETHE_KEY_PASSPHRASE"  # the passphrase for passphrase-wrapped keys, when not given


class KeyringUnavailableError(StateError):
    """Keys are to be (or are) held by the OS keyring, and none is reachable."""


def key_storage(home) -> str:
    """How the home's secret keys are held: ``keyring``, ``passphrase``, ``plain`` or ``none``.

    Read from the key files' own descriptions (no secret is read).  When keys
    are held differently, the weakest is named (``plain`` before ``passphrase``
    before ``keyring``).
    """
    keys = (home if isinstance(home, Home) else Home(home)).keys
    found = set()
    for name in (VAULT_KEY_FILE, CONTENT_KEY_FILE, DEVICE_KEY_FILE):
        try:
            data = (keys / name).read_bytes()
        except OSError:
            continue
        if data.lstrip().startswith(b"{"):
            try:
                doc = json.loads(data)
            except ValueError:
                continue
            if doc.get("store") == "keyring":
                found.add("keyring")
            elif doc.get("wrap") == "scrypt-aesgcm":
                found.add("passphrase")
            else:
                found.add("plain")
        else:
            found.add("passphrase" if b"ENCRYPTED PRIVATE KEY" in data else "plain")
    for s in ("plain", "passphrase", "keyring"):
        if s in found:
            return s
    return "none"


def keyring_available() -> bool:
    """Whether an OS keyring with a usable backend is reachable now."""
    return _keyring() is not None


class Keystore:
    """The home's keys.

    Parameters
    ----------
    home : Home or path-like
        The lethe home (its ``keys/`` directory holds the key files).
    passphrase : bytes or str, optional
        Needed to open passphrase-wrapped keys; default the environment
        variable ``LETHE_KEY_PASSPHRASE``.
    use_keyring : bool, optional
        Deprecated spelling: ``False`` chooses ``storage="passphrase"`` with a
        passphrase and ``storage="plain"`` without one.
    storage : {"keyring", "passphrase", "plain"}, optional
        How *new* keys are held (existing keys say how they are held).
        ``keyring`` (the default): the vault, content and device keys live in
        the OS keyring (Secret Service on Linux, Keychain on macOS) and the key
        files only say where; ``passphrase``: wrapped under a scrypt key
        derived from the passphrase; ``plain``: unwrapped files, only by
        explicit choice (``lethe init --key-storage plain``, or the environment
        variable ``LETHE_KEY_STORAGE``) and reported as a warning.
    """

    def __init__(self, home, passphrase: bytes | None = None, *, use_keyring: bool | None = None,
                 storage: str | None = None):
        self.home = home if isinstance(home, Home) else Home(home)
        if passphrase is None and os.environ.get(PASSPHRASE_ENV):
            passphrase = os.environ[PASSPHRASE_ENV].encode("utf-8")
        self._passphrase = _as_passphrase(passphrase)
        if storage is None:
            if self._passphrase is not None:
                storage = "passphrase"
            elif use_keyring is False:
                storage = "plain"
            else:
                storage = os.environ.get(STORAGE_ENV) or "keyring"
        if storage not in KEY_STORAGES:
            raise UsageError(f"key storage {storage!r}: expected one of {', '.join(KEY_STORAGES)}")
        if storage == "passphrase" and self._passphrase is None:
            raise UsageError("key storage 'passphrase' needs a passphrase (or LETHE_KEY_PASSPHRASE)")
        self.storage = storage
        self._use_keyring = storage == "keyring"
        self._cache: dict[str, Any] = {}

    keys_dir = property(lambda self: self.home.keys)

    def __repr__(self):
        return f"Keystore({str(self.home.root)!r}, passphrase={'set' if self._passphrase else 'none'})"

    # -- creation ----------------------------------------------------------
    def exists(self) -> bool:
        return all((self.keys_dir / n).exists() for n in (VAULT_KEY_FILE, CONTENT_KEY_FILE,
                                                            DEVICE_KEY_FILE, DEVICE_PUB_FILE))

    def ensure(self) -> Keystore:
        """Create any missing key (idempotent); existing keys are never replaced."""
        old = os.umask(0o077)
        try:
            self.keys_dir.mkdir(parents=True, exist_ok=True, mode=DIR_MODE)
            os.chmod(self.keys_dir, DIR_MODE)
        finally:
            os.umask(old)
        missing = [n for n in (VAULT_KEY_FILE, CONTENT_KEY_FILE, DEVICE_KEY_FILE) if not (self.keys_dir / n).exists()]
        if missing and self._use_keyring and _keyring() is None:
            raise KeyringUnavailableError(
                f"{self.keys_dir}: no OS keyring (Secret Service, Keychain) is reachable to hold the keys; "
                f"unlock or install one, or choose another storage ('lethe init --key-storage passphrase', "
                f"or 'plain' to keep unwrapped key files, which is reported as a warning)")
        for name, label in ((VAULT_KEY_FILE, "vault"), (CONTENT_KEY_FILE, "content")):
            if not (self.keys_dir / name).exists():
                self._create_secret(name, label)
        priv = self.keys_dir / DEVICE_KEY_FILE
        if not priv.exists():
            key = Ed25519PrivateKey.generate()
            if self._use_keyring:
                raw = key.private_bytes(serialization.Encoding.Raw, serialization.PrivateFormat.Raw,
                                        serialization.NoEncryption())
                account = self._keyring_account("device")
                _keyring().set_password(KEYRING_SERVICE, account, raw.hex())
                doc = {"v": KEYFILE_VERSION, "name": "device", "store": "keyring", "service": KEYRING_SERVICE,
                       "account": account, "wrap": "none"}
                write_private(priv, json.dumps(doc, sort_keys=True).encode() + b"\n")
                self._write_public(key.public_key())
                self._cache["device"] = key
                return self
            if self._passphrase:
                # cryptography encrypts PKCS8 with PBKDF2 at 2048 rounds, far
                # cheaper to guess than scrypt; so the PEM password is the
                # scrypt KEK (hex) and the KDF parameters sit beside the PEM.
                kdf = {"n": SCRYPT_N, "r": SCRYPT_R, "p": SCRYPT_P, "salt": os.urandom(SALT_BYTES).hex()}
                write_private(self.keys_dir / DEVICE_KDF_FILE,
                              json.dumps({"v": KEYFILE_VERSION, "kdf": kdf}, sort_keys=True).encode() + b"\n")
                enc: serialization.KeySerializationEncryption = serialization.BestAvailableEncryption(
                    self._pem_password(kdf))
            else:
                enc = serialization.NoEncryption()
            write_private(priv, key.private_bytes(serialization.Encoding.PEM,
                                                  serialization.PrivateFormat.PKCS8, enc))
            self._write_public(key.public_key())
            self._cache["device"] = key
        elif not (self.keys_dir / DEVICE_PUB_FILE).exists():
            self._write_public(self.device_key().public_key())
        return self

    def _write_public(self, pub: Ed25519PublicKey) -> None:
        write_private(self.keys_dir / DEVICE_PUB_FILE, (_raw_public(pub).hex() + "\n").encode("ascii"))

    def _create_secret(self, name: str, label: str) -> None:
        secret = os.urandom(KEY_BYTES)
        doc = {"v": KEYFILE_VERSION, "name": label}
        if self._use_keyring:
            account = self._keyring_account(label)
            kr = _keyring()
            if kr is None:
                raise KeyringUnavailableError(f"{self.keys_dir}: the OS keyring is not reachable")
            kr.set_password(KEYRING_SERVICE, account, secret.hex())
            doc.update(store="keyring", service=KEYRING_SERVICE, account=account, wrap="none")
        else:
            doc["store"] = "file"
            if self._passphrase:
                doc.update(self._wrap(secret, label))
            else:
                doc.update(wrap="none", key=secret.hex())
        write_private(self.keys_dir / name, json.dumps(doc, sort_keys=True).encode() + b"\n")
        self._cache[label] = secret

    def _keyring_account(self, label: str) -> str:
        # One entry per home: the home path's hash keeps two homes apart
        # without putting the path itself in the keyring's listing.
        tag = hashlib.sha256(str(self.home.root).encode()).hexdigest()[:16]
        return f"{label}:{tag}"

    # -- passphrase wrap -----------------------------------------------------
    def _kek(self, salt: bytes, n: int, r: int, p: int) -> bytes:
        if self._passphrase is None:
            raise PassphraseError(f"{self.keys_dir}: a passphrase is needed for these key files")
        return derive_kek(self._passphrase, salt, n=n, r=r, p=p)

    def _pem_password(self, kdf: dict) -> bytes:
        kek = self._kek(bytes.fromhex(kdf["salt"]), int(kdf["n"]), int(kdf["r"]), int(kdf["p"]))
        return kek.hex().encode("ascii")

    def _wrap(self, secret: bytes, label: str) -> dict:
        salt, nonce = os.urandom(SALT_BYTES), os.urandom(12)
        kek = self._kek(salt, SCRYPT_N, SCRYPT_R, SCRYPT_P)
        ct = AESGCM(kek).encrypt(nonce, secret, f"lethe-key\0{label}".encode())
        return {"wrap": "scrypt-aesgcm", "kdf": {"n": SCRYPT_N, "r": SCRYPT_R, "p": SCRYPT_P,
                                                  "salt": salt.hex()},
                "nonce": nonce.hex(), "ct": ct.hex()}

    # -- reading -------------------------------------------------------------
    def _secret(self, name: str, label: str) -> bytes:
        if label in self._cache:
            return self._cache[label]
        path = self.keys_dir / name
        try:
            doc = json.loads(path.read_text("utf-8"))
        except FileNotFoundError:
            raise StateError(f"{path}: missing key file; run 'lethe init' (or Keystore.ensure())") from None
        except (ValueError, UnicodeDecodeError):
            raise IntegrityError(f"{path}: damaged key file (not JSON)") from None
        if not isinstance(doc, dict) or doc.get("v") != KEYFILE_VERSION:
            raise IntegrityError(f"{path}: unsupported key file (expected v={KEYFILE_VERSION})")
        try:
            if doc.get("store") == "keyring":
                kr = _keyring()
                if kr is None:
                    raise KeyringUnavailableError(f"{path}: the key is kept in the OS keyring, which is not "
                                                  f"available now (a copied home does not open without it)")
                value = kr.get_password(doc["service"], doc["account"])
                if value is None:
                    raise KeyringUnavailableError(f"{path}: the OS keyring has no entry {doc['account']!r} (a home "
                                                  f"copied or moved from elsewhere does not open without its keyring)")
                secret = bytes.fromhex(value)
            elif doc.get("wrap") == "none":
                secret = bytes.fromhex(doc["key"])
            elif doc.get("wrap") == "scrypt-aesgcm":
                if not self._passphrase:
                    raise PassphraseError(f"{path}: this key is protected by a passphrase; none was given")
                kdf = doc["kdf"]
                kek = self._kek(bytes.fromhex(kdf["salt"]), int(kdf["n"]), int(kdf["r"]), int(kdf["p"]))
                try:
                    secret = AESGCM(kek).decrypt(bytes.fromhex(doc["nonce"]), bytes.fromhex(doc["ct"]),
                                                 f"lethe-key\0{label}".encode())
                except InvalidTag:
                    raise PassphraseError(f"{path}: wrong passphrase (or the key file was altered)") from None
            else:
                raise IntegrityError(f"{path}: unknown key wrapping {doc.get('wrap')!r}")
        except (KeyError, TypeError, ValueError) as e:
            raise IntegrityError(f"{path}: damaged key file ({e.__class__.__name__}: {e})") from None
        if len(secret) != KEY_BYTES:
            raise IntegrityError(f"{path}: key has {len(secret)} bytes, expected {KEY_BYTES}")
        self._cache[label] = secret
        return secret

    def vault_key(self) -> bytes:
        """The 32-byte AES-256-GCM key for the vault."""
        return self._secret(VAULT_KEY_FILE, "vault")

    def content_key(self) -> bytes:
        """The 32-byte HMAC-SHA256 key for content MACs."""
        return self._secret(CONTENT_KEY_FILE, "content")

    def device_key(self) -> Ed25519PrivateKey:
        """The Ed25519 signing key (needs the passphrase if it was created with one)."""
        if "device" in self._cache:
            return self._cache["device"]
        path = self.keys_dir / DEVICE_KEY_FILE
        try:
            pem = path.read_bytes()
        except FileNotFoundError:
            raise StateError(f"{path}: missing device key; run 'lethe init' (or Keystore.ensure())") from None
        if pem.lstrip().startswith(b"{"):
            key = self._device_from_keyring(path, pem)
            self._cache["device"] = key
            return key
        encrypted = b"ENCRYPTED PRIVATE KEY" in pem
        if encrypted and not self._passphrase:
            raise PassphraseError(f"{path}: the device key is protected by a passphrase; none was given")
        password = None
        if encrypted:
            kdf_path = self.keys_dir / DEVICE_KDF_FILE
            try:
                kdf = json.loads(kdf_path.read_text("utf-8"))["kdf"]
                password = self._pem_password(kdf)
            except FileNotFoundError:
                raise StateError(f"{kdf_path}: missing; the encrypted device key cannot be opened") from None
            except (ValueError, KeyError, TypeError):
                raise IntegrityError(f"{kdf_path}: damaged key-derivation parameters") from None
        try:
            loaded = serialization.load_pem_private_key(pem, password=password)
        except ValueError:
            if encrypted:
                raise PassphraseError(f"{path}: wrong passphrase (or the key file was altered)") from None
            raise IntegrityError(f"{path}: damaged device key (not a PKCS8 PEM key)") from None
        if not isinstance(loaded, Ed25519PrivateKey):
            raise IntegrityError(f"{path}: not an Ed25519 key")
        self._cache["device"] = loaded
        return loaded

    def _device_from_keyring(self, path: Path, data: bytes) -> Ed25519PrivateKey:
        try:
            doc = json.loads(data)
            service, account = doc["service"], doc["account"]
        except (ValueError, KeyError, TypeError):
            raise IntegrityError(f"{path}: damaged device key file") from None
        if doc.get("store") != "keyring":
            raise IntegrityError(f"{path}: unknown device key storage {doc.get('store')!r}")
        kr = _keyring()
        if kr is None:
            raise KeyringUnavailableError(f"{path}: the device key is kept in the OS keyring, which is not "
                                          f"available now (a copied home does not open without it)")
        value = kr.get_password(service, account)
        if value is None:
            raise KeyringUnavailableError(f"{path}: the OS keyring has no entry {account!r} (a home copied "
                                          f"or moved from elsewhere does not open without its keyring)")
        try:
            return Ed25519PrivateKey.from_private_bytes(bytes.fromhex(value))
        except ValueError:
            raise IntegrityError(f"{path}: the keyring entry {account!r} is not an Ed25519 key") from None

    def device_public(self) -> Ed25519PublicKey:
        """The device's public key, read from ``device.pub`` (no passphrase needed)."""
        return read_device_public(self.keys_dir)

    def device_key_id(self) -> str:
        return device_key_id(self.device_public())

    # -- withdrawal ------------------------------------------------------------
    def destroy(self) -> int:
        """Overwrite and unlink every key file (and keyring entries); returns files removed.

        Once the vault key is gone the vault's ciphertext cannot be read, even
        where the filesystem keeps old blocks (see ``docs/vault.md``).
        """
        removed = 0
        for name in (VAULT_KEY_FILE, CONTENT_KEY_FILE, DEVICE_KEY_FILE):
            path = self.keys_dir / name
            try:
                doc = json.loads(path.read_text("utf-8"))
                if doc.get("store") == "keyring":
                    kr = _keyring()
                    if kr is not None:
                        kr.delete_password(doc["service"], doc["account"])
            except Exception:  # noqa: BLE001 - a damaged or absent file is removed below all the same
                pass
        for name in (VAULT_KEY_FILE, CONTENT_KEY_FILE, DEVICE_KEY_FILE, DEVICE_KDF_FILE, DEVICE_PUB_FILE):
            path = self.keys_dir / name
            if path.exists() or path.is_symlink():
                overwrite_and_unlink(path)
                removed += 1
        self._cache.clear()
        return removed
