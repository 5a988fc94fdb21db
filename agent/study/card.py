"""The study card (researcher -> participant) and the enrolment file (participant -> researcher).

Both are small JSON documents specified in ``docs/bundle-format.md``:

* **study card**, ``"lethe-study-card"`` v1: study id, suite, the study's HPKE
  public key and its fingerprint, the approved policy fingerprints, a contact
  line, the consent text and the issue date.  A card is public; it is not
  signed (the participant checks the fingerprint out of band if needed, and a
  policy may pin it in ``[study].key_fingerprint``).
* **enrolment file**, ``"lethe-enrolment"`` v1: study id, pseudonym, the
  device's Ed25519 public key and key id, the policy fingerprint and the date,
  signed by the device key over the canonical JSON of every other field (proof
  that the sender holds the private key).

Loading is strict: unknown or missing fields, wrong types and bad encodings
raise :class:`~agent.errors.DataError` naming the file and the field.
"""

from __future__ import annotations

import datetime as _dt
import json
import dataclasses
from dataclasses import dataclass, field
from pathlib import Path

from .. import contracts
from ..errors import DataError, IntegrityError, StateError
from ..fsutil import write_private
from ..identity import device_key_id
from ..canonical import dumps as canonical_json
from ..hpke_suites import PUBLIC_KEY_BYTES, SUITES, key_fingerprint, public_key_object
from .keys import b64d, b64e, load_public

CARD_FORMAT = "lethe-study-card"
CARD_VERSION = 2
CARD_VERSION_SERVER = 3  # version 2 plus "server": {"url", "certificate_sha256"} (docs/server.md)
ENROLMENT_FORMAT = "lethe-enrolment"
ENROLMENT_VERSION = 2

@dataclass(frozen=True)
class StudyCard:
    """A validated study card.  ``public_key`` is the raw key bytes."""

    study_id: str
    suite: str
    public_key: bytes
    key_fingerprint: str
    approved_policies: tuple[str, ...]
    contact: str
    consent_text: str
    issued: str
    source: str = field(default="<memory>", compare=False)
    server_url: str | None = None
    server_pin: str | None = None

    @property
    def suite_names(self) -> dict:
        return dict(SUITES[self.suite])

    def hpke_public_key(self):
        return public_key_object(self.suite, self.public_key)

    def as_dict(self) -> dict:
        return {
            "format": CARD_FORMAT, "version": CARD_VERSION, "study_id": self.study_id,
            "suite": self.suite, **SUITES[self.suite], "public_key": b64e(self.public_key),
            "key_fingerprint": self.key_fingerprint, "approved_policies": list(self.approved_policies),
            "contact": self.contact, "consent_text": self.consent_text, "issued": self.issued,
            **({"version": CARD_VERSION_SERVER,
                "server": {"url": self.server_url, "certificate_sha256": self.server_pin}} if self.server_url else {}),
        }


# -- study card --------------------------------------------------------------

def card_from_dict(doc: dict, source="<memory>") -> StudyCard:
    """Validate a card document strictly and return a :class:`StudyCard`.

    The shape is ``agent/contracts/schemas/study-card.json``.  Version 2 has no
    server; version 3 adds ``server`` = ``{"url": "https://...", "certificate_sha256": hex64}``,
    where agents upload and the certificate they pin.  Beyond the schema: the
    suite's algorithms, the key length and the key fingerprint.
    """
    version = doc.get("version") if isinstance(doc, dict) else None
    contracts.check_header(doc, CARD_FORMAT, CARD_VERSION_SERVER if version == CARD_VERSION_SERVER else CARD_VERSION,
                  source, "study card")
    contracts.validate("study-card", doc, source)
    suite = doc["suite"]
    for k in ("kem", "kdf", "aead"):
        if doc[k] != SUITES[suite][k]:
            raise DataError(f"{source}: [{k}] {doc[k]!r} does not match suite {suite!r} ({SUITES[suite][k]!r})")
    public = b64d(doc["public_key"], what="public_key", source=source)
    if len(public) != PUBLIC_KEY_BYTES[suite]:
        raise DataError(f"{source}: [public_key] a {suite!r} key has {PUBLIC_KEY_BYTES[suite]} bytes, "
                        f"got {len(public)}")
    if key_fingerprint(public) != doc["key_fingerprint"]:
        raise IntegrityError(f"{source}: [key_fingerprint] does not match the card's public key "
                             f"(card says {doc['key_fingerprint'][:16]}…, key hashes to "
                             f"{key_fingerprint(public)[:16]}…)")
    server = (doc["server"]["url"].rstrip("/"), doc["server"]["certificate_sha256"]) if "server" in doc else None
    return StudyCard(doc["study_id"], suite, public, doc["key_fingerprint"], tuple(doc["approved_policies"]),
                     doc["contact"], doc["consent_text"], doc["issued"], str(source),
                     *(server or (None, None)))


def load_card(path) -> StudyCard:
    """Read and strictly validate a study card file."""
    return card_from_dict(contracts.read_json(path, "study card"), source=str(path))


def make_card(study_dir, policies, contact: str | None = None, *, issued: _dt.date | None = None,
              server_url: str | None = None, server_pin: str | None = None) -> StudyCard:
    """Build the study card from ``STUDYDIR/keys/study.pub`` and the approved policies.

    Every policy must name the key's study id, and a policy that pins
    ``[study].key_fingerprint`` must pin this key.  The consent text is the
    first policy's; ``contact`` defaults to the first policy's contact line.
    """
    from ..policy import Policy, load_policy

    pub = load_public(study_dir)
    pols = [p if isinstance(p, Policy) else load_policy(p) for p in policies]
    if not pols:
        raise DataError("a study card needs at least one approved policy")
    for p in pols:
        if p.study.study_id != pub["study_id"]:
            raise StateError(f"{p.source}: [study.study_id] {p.study.study_id!r} is not this study "
                             f"({pub['study_id']!r})")
        pinned = p.study.key_fingerprint
        if pinned and pinned != pub["key_fingerprint"]:
            raise StateError(f"{p.source}: [study.key_fingerprint] pins key {pinned}, but the study key "
                             f"is {pub['key_fingerprint']}; refusing to approve it on this card")
    fps = list(dict.fromkeys(p.fingerprint for p in pols))
    contact = contact if contact is not None else pols[0].study.contact
    issued_on = (issued or _dt.datetime.now(_dt.UTC).date()).isoformat()
    card = StudyCard(pub["study_id"], pub["suite"], pub["public_key"], pub["key_fingerprint"],
                     tuple(fps), contact, pols[0].study.consent_text, issued_on)
    if server_url is not None or server_pin is not None:
        server = {"url": server_url, "certificate_sha256": server_pin}
        contracts.validate("study-card", {**card.as_dict(), "version": CARD_VERSION_SERVER, "server": server},
                           "study card")
        card = dataclasses.replace(card, server_url=str(server_url).rstrip("/"), server_pin=server_pin)
    return card


def card_path(study_dir) -> Path:
    """The study's own copy of its current card (``open`` reads the approved list from it)."""
    return Path(study_dir) / "card.json"


def write_card(study_dir, policies, contact: str | None = None, out=None, *, server_url: str | None = None,
               server_pin: str | None = None) -> Path:
    """Write the study card to ``out`` and to ``STUDYDIR/card.json``; returns ``out``."""
    card = make_card(study_dir, policies, contact, server_url=server_url, server_pin=server_pin)
    data = (json.dumps(card.as_dict(), indent=2, sort_keys=True, ensure_ascii=False) + "\n").encode()
    write_private(card_path(study_dir), data)
    out = Path(out) if out is not None else card_path(study_dir)
    if out.absolute() != card_path(study_dir).absolute():
        write_private(out, data)
    import os

    os.chmod(out, 0o644)  # a card is public
    return out


def study_card(study_dir) -> StudyCard:
    p = card_path(study_dir)
    if not p.exists():
        raise StateError(f"{p}: this study has no card yet; run 'lethe study card' first")
    return load_card(p)


def check_policy_approved(card: StudyCard, policy) -> None:
    """Raise :class:`StateError` unless the card approves ``policy`` (and it names this study/key)."""
    fp = policy.fingerprint
    if policy.study.study_id != card.study_id:
        raise StateError(f"{policy.source}: [study.study_id] {policy.study.study_id!r} does not match the "
                         f"study card {card.source} ({card.study_id!r})")
    pinned = policy.study.key_fingerprint
    if pinned and pinned != card.key_fingerprint:
        raise StateError(f"{policy.source}: [study.key_fingerprint] {pinned} does not match the key on the "
                         f"study card {card.source} ({card.key_fingerprint})")
    if fp not in card.approved_policies:
        raise StateError(f"{policy.source}: policy fingerprint {fp} is not approved by the study card "
                         f"{card.source} (approved: {', '.join(card.approved_policies)})")


# -- enrolment ---------------------------------------------------------------

def _raw_public(device_private_key) -> bytes:
    from cryptography.hazmat.primitives import serialization

    return device_private_key.public_key().public_bytes(serialization.Encoding.Raw,
                                                        serialization.PublicFormat.Raw)


def make_enrolment(card: StudyCard, policy, pseudonym: str, device_private_key, *,
                   created: _dt.date | None = None, log_origin: str | None = None) -> dict:
    """The signed enrolment document for this device.

    Parameters
    ----------
    card : StudyCard
    policy : Policy
        The policy the participant enrols under; must be approved by the card.
    pseudonym : str
        4-64 characters from ``[A-Za-z0-9_-]``.
    device_private_key : Ed25519PrivateKey
        The device key (``Keystore(home).device_key()``).
    log_origin : str, optional
        The hash of the device ledger's first entry (64 hex digits); the study
        checks every bundle's log against it (``docs/ledger.md``).
    """
    check_policy_approved(card, policy)
    pub = _raw_public(device_private_key)
    created_on = (created or _dt.datetime.now(_dt.UTC).date()).isoformat()
    doc = {"format": ENROLMENT_FORMAT, "version": ENROLMENT_VERSION, "study_id": card.study_id,
           "pseudonym": pseudonym, "device_public_key": b64e(pub), "device_key_id": device_key_id(pub),
           "policy_fingerprint": policy.fingerprint, "created": created_on}
    if log_origin is not None:
        doc["log_origin"] = log_origin
    # Checked before signing: a bad pseudonym or log origin names the field.
    contracts.validate("enrolment", {**doc, "signature": ""}, "<new enrolment>")
    doc["signature"] = b64e(device_private_key.sign(canonical_json(doc)))
    return doc


def write_enrolment(home, card: StudyCard, policy, pseudonym: str, out_path, *,
                    device_private_key, log_origin: str | None = None) -> Path:
    """Write the enrolment file signed with ``device_private_key`` to ``out_path`` (atomic, 0600).

    ``home`` is not read: the device side (``agent.participant.enrol``) passes its
    own key, so the researcher package needs nothing of the device's keystore.
    """
    doc = make_enrolment(card, policy, pseudonym, device_private_key, log_origin=log_origin)
    out = Path(out_path)
    write_private(out, (json.dumps(doc, indent=2, sort_keys=True) + "\n").encode())
    return out


def verify_enrolment(doc: dict, source="<memory>") -> dict:
    """Check an enrolment document's shape and its proof of possession.

    Returns ``{"study_id", "pseudonym", "device_public_key" (bytes), "device_key_id",
    "policy_fingerprint", "created"}``.
    """
    from cryptography.exceptions import InvalidSignature
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

    contracts.check_header(doc, ENROLMENT_FORMAT, ENROLMENT_VERSION, source, "enrolment")
    contracts.validate("enrolment", doc, source)
    pub = b64d(doc["device_public_key"], what="device_public_key", source=source)
    if len(pub) != 32:
        raise DataError(f"{source}: [device_public_key] an Ed25519 public key has 32 bytes, got {len(pub)}")
    if doc["device_key_id"] != device_key_id(pub):
        raise DataError(f"{source}: [device_key_id] does not match the device public key")
    sig = b64d(doc["signature"], what="signature", source=source)
    body = canonical_json({k: v for k, v in doc.items() if k != "signature"})
    try:
        Ed25519PublicKey.from_public_bytes(pub).verify(sig, body)
    except (InvalidSignature, ValueError):
        raise IntegrityError(f"{source}: [signature] the enrolment is not signed by the device key it names") from None
    return {"study_id": doc["study_id"], "pseudonym": doc["pseudonym"], "device_public_key": pub,
            "device_key_id": doc["device_key_id"], "policy_fingerprint": doc["policy_fingerprint"],
            "created": doc["created"], "log_origin": doc.get("log_origin")}


def load_enrolment(path) -> dict:
    return verify_enrolment(contracts.read_json(path, "enrolment"), source=str(path))
