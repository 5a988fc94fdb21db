"""Withdrawal certificates ("lethe-withdrawal" v1): made on the device, checked by the study.

When a participant withdraws, the device signs a certificate with its Ed25519
key just before the key is destroyed.  The certificate says who withdrew (the
pseudonym and device key id), when (UTC, to the minute), where the audit
ledger ended (its head sequence number and hash) and how many records of each
table were destroyed.  It carries no content.

The device public key is included so that the certificate can be checked on
its own (:func:`verify_withdrawal_signature`); the researcher's check
(:func:`verify_withdrawal`) also requires that key to be the one enrolled
under that pseudonym.
"""

from __future__ import annotations

import datetime as _dt
import json
from dataclasses import dataclass
from pathlib import Path

from .. import contracts
from ..errors import DataError, IntegrityError, StateError
from ..fsutil import write_private
from ..canonical import dumps as canonical_json
from ..identity import device_key_id
from .keys import b64d, b64e

WITHDRAWAL_FORMAT = "lethe-withdrawal"
WITHDRAWAL_VERSION = 1

def _minute_utc(now) -> str:
    if now is None:
        t = _dt.datetime.now(_dt.UTC)
    elif isinstance(now, (int, float)):
        t = _dt.datetime.fromtimestamp(now, _dt.UTC)
    else:
        t = now.astimezone(_dt.UTC)
    return t.strftime("%Y-%m-%dT%H:%MZ")


def make_withdrawal_certificate(study_id: str, pseudonym: str, device_private_key, ledger_head: dict,
                                counts_destroyed: dict, now=None) -> dict:
    """Sign a withdrawal certificate with the device key.

    Parameters
    ----------
    study_id, pseudonym : str
    device_private_key : Ed25519PrivateKey
    ledger_head : dict
        ``{"seq": int, "hash": str}`` of the last ledger entry (``digest(...)["head"]``).
    counts_destroyed : dict
        ``{table: n}`` records destroyed per vault table (and ``"files"`` etc.).
    now : float (Unix seconds) or datetime, optional
        Recorded in UTC to the minute.
    """
    from cryptography.hazmat.primitives import serialization

    pub = device_private_key.public_key().public_bytes(serialization.Encoding.Raw,
                                                       serialization.PublicFormat.Raw)
    doc = {"format": WITHDRAWAL_FORMAT, "version": WITHDRAWAL_VERSION, "study_id": study_id,
           "pseudonym": pseudonym, "device_public_key": b64e(pub), "device_key_id": device_key_id(pub),
           "time": _minute_utc(now),
           "ledger_head": {"seq": int(ledger_head["seq"]), "hash": str(ledger_head["hash"])},
           "counts_destroyed": {str(k): int(v) for k, v in sorted(counts_destroyed.items())}}
    contracts.validate("withdrawal", {**doc, "signature": ""}, "<new certificate>")
    doc["signature"] = b64e(device_private_key.sign(canonical_json(doc)))
    return doc


UNSIGNED_FORMAT = "lethe-withdrawal-unsigned"


def make_unsigned_withdrawal(study_id: str, pseudonym: str, device_public_key, ledger_head: dict | None,
                             counts_destroyed: dict, why_unsigned: str, now=None) -> dict:
    """The record a device keeps when it withdrew but could not sign (its device key was unavailable).

    Same facts as a certificate where they could be had (the public key comes
    from ``device.pub``, which needs no secret), no signature, and the reason
    in words.  It proves nothing: :func:`verify_withdrawal_signature` refuses it.
    """
    pub = None
    if device_public_key is not None:
        from cryptography.hazmat.primitives import serialization

        pub = device_public_key.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)
    return {"format": UNSIGNED_FORMAT, "version": 1, "signed": False, "study_id": study_id,
            "pseudonym": pseudonym, "device_public_key": b64e(pub) if pub else None,
            "device_key_id": device_key_id(pub) if pub else None, "time": _minute_utc(now),
            "ledger_head": ledger_head,
            "counts_destroyed": {str(k): int(v) for k, v in sorted(counts_destroyed.items())},
            "why_unsigned": ("the device key could not be used, so this record is NOT signed and the study "
                             f"cannot verify it: {why_unsigned}. Everything lethe held on the device was "
                             "destroyed all the same. Contact the study team to confirm the withdrawal.")}


def _refuse_unsigned(cert, source) -> None:
    if isinstance(cert, dict) and cert.get("format") == UNSIGNED_FORMAT:
        raise IntegrityError(
            f"{source}: an UNSIGNED withdrawal record (pseudonym {cert.get('pseudonym')!r}), not a withdrawal "
            f"certificate: it cannot be verified and is not accepted as one. The device says: "
            f"{cert.get('why_unsigned', 'no reason given')} Confirm the withdrawal with the participant directly "
            f"(through the study contact) and record it as your protocol says.")


def write_withdrawal_certificate(path, cert: dict) -> Path:
    write_private(Path(path), (json.dumps(cert, indent=2, sort_keys=True) + "\n").encode())
    return Path(path)


@dataclass(frozen=True)
class WithdrawalCheck:
    """The outcome of a successful verification."""

    study_id: str
    pseudonym: str
    device_key_id: str
    time: str
    ledger_head: dict
    counts_destroyed: dict

    def as_dict(self) -> dict:
        return dict(self.__dict__)


def verify_withdrawal_signature(cert: dict, public_key=None, source="<memory>") -> WithdrawalCheck:
    """Check shape and signature (against ``public_key`` if given, else the key in the certificate)."""
    from cryptography.exceptions import InvalidSignature
    from cryptography.hazmat.primitives import serialization
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

    _refuse_unsigned(cert, source)
    contracts.check_header(cert, WITHDRAWAL_FORMAT, WITHDRAWAL_VERSION, source, "withdrawal certificate")
    contracts.validate("withdrawal", cert, source)
    pub = b64d(cert["device_public_key"], what="device_public_key", source=source)
    if len(pub) != 32 or device_key_id(pub) != cert["device_key_id"]:
        raise DataError(f"{source}: [device_key_id] does not match the device public key")
    if public_key is not None:
        given = public_key if isinstance(public_key, bytes) else public_key.public_bytes(
            serialization.Encoding.Raw, serialization.PublicFormat.Raw)
        if given != pub:
            want = device_key_id(given) if len(given) == 32 else f"a key of {len(given)} bytes"
            raise IntegrityError(f"{source}: [device_public_key] is not the expected device key "
                                 f"(certificate names {cert['device_key_id']}, expected {want})")
    sig = b64d(cert["signature"], what="signature", source=source)
    body = canonical_json({k: v for k, v in cert.items() if k != "signature"})
    try:
        Ed25519PublicKey.from_public_bytes(pub).verify(sig, body)
    except InvalidSignature:
        raise IntegrityError(f"{source}: [signature] the withdrawal certificate's signature does not verify "
                             f"(altered, or not signed by device {cert['device_key_id']})") from None
    return WithdrawalCheck(cert["study_id"], cert["pseudonym"], cert["device_key_id"], cert["time"],
                           dict(cert["ledger_head"]), dict(cert["counts_destroyed"]))


def verify_withdrawal(cert: dict, registry, source="<memory>") -> WithdrawalCheck:
    """Verify a certificate against the study's enrolment registry.

    The pseudonym must be enrolled in this study, the certificate's device key
    must be the enrolled one, and the signature must verify with it.

    Parameters
    ----------
    cert : dict
    registry : Registry
        From :class:`agent.study.registry.Registry`.
    """
    _refuse_unsigned(cert, source)
    if isinstance(cert, dict) and cert.get("study_id") not in (None, registry.study_id):
        raise StateError(f"{source}: [study_id] {cert.get('study_id')!r} is not this study ({registry.study_id!r})")
    if not isinstance(cert, dict) or not isinstance(cert.get("pseudonym"), str):
        return verify_withdrawal_signature(cert, None, source)  # raises the shape error
    device = registry.device(cert["pseudonym"])
    if device is None:
        raise StateError(f"{source}: [pseudonym] {cert['pseudonym']!r} is not enrolled in study {registry.study_id!r}")
    return verify_withdrawal_signature(cert, device.public_bytes, source)


def load_withdrawal(path) -> dict:
    return contracts.read_json(path, "withdrawal certificate")


def register_withdrawal(study_dir, cert_path) -> WithdrawalCheck:
    """Verify a certificate file, keep a copy in ``STUDYDIR/withdrawals/`` and mark the device withdrawn."""
    from .registry import Registry, locked

    cert = load_withdrawal(cert_path)
    with locked(study_dir):
        reg = Registry.load(study_dir)
        check = verify_withdrawal(cert, reg, source=str(cert_path))
        write_private(Path(study_dir) / "withdrawals" / f"{check.pseudonym}.json",
                      (json.dumps(cert, indent=2, sort_keys=True) + "\n").encode())
        reg.devices[check.pseudonym].withdrawn = check.time
        reg.save()
    return check
