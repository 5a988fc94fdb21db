"""The researcher's registry: enrolled devices, sequence numbers seen, opened bundles.

``STUDYDIR/registry.json`` ("lethe-study-registry" v1)::

    {"format": "lethe-study-registry", "version": 1, "study_id": "...",
     "devices": {"<pseudonym>": {"device_public_key": b64, "device_key_id": hex16,
                                 "policy_fingerprint": hex64, "enrolled": "YYYY-MM-DD",
                                 "seen": {"<seq>": "<sha256 of the bundle file>"},
                                 "withdrawn": null | "YYYY-MM-DDTHH:MMZ"}}}

Opened payloads live in ``STUDYDIR/received/<pseudonym>/<seq>.json`` as
``{"header": {...}, "payload": {...}}``.  Every write is atomic (temp file,
fsync, rename) and done under an exclusive lock on ``STUDYDIR/registry.lock``.
"""

from __future__ import annotations

import base64
import json
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import DataError, StateError
from ..fsutil import file_lock, write_private
from .card import load_enrolment
from .keys import load_public

REGISTRY_FORMAT = "lethe-study-registry"
REGISTRY_VERSION = 1


@dataclass
class Device:
    pseudonym: str
    public_bytes: bytes
    device_key_id: str
    policy_fingerprint: str
    enrolled: str
    seen: dict = field(default_factory=dict)  # str(seq) -> sha256 hex of the bundle
    withdrawn: str | None = None
    log_origin: str | None = None  # the enrolment's ledger origin (docs/ledger.md)

    def public_key(self):
        from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

        return Ed25519PublicKey.from_public_bytes(self.public_bytes)

    def to_json(self) -> dict:
        return {"device_public_key": base64.b64encode(self.public_bytes).decode(),
                "device_key_id": self.device_key_id, "policy_fingerprint": self.policy_fingerprint,
                "enrolled": self.enrolled, "seen": dict(self.seen), "withdrawn": self.withdrawn,
                "log_origin": self.log_origin}


class Registry:
    """Enrolled devices of one study.  Load with :meth:`load`, change, then :meth:`save`."""

    def __init__(self, study_dir, study_id: str, devices: dict[str, Device] | None = None):
        self.study_dir = Path(study_dir)
        self.study_id = study_id
        self.devices: dict[str, Device] = devices or {}

    path = property(lambda self: self.study_dir / "registry.json")
    received_dir = property(lambda self: self.study_dir / "received")

    @classmethod
    def load(cls, study_dir) -> Registry:
        study_dir = Path(study_dir)
        p = study_dir / "registry.json"
        if not p.exists():
            return cls(study_dir, load_public(study_dir)["study_id"])
        try:
            doc = json.loads(p.read_text("utf-8"))
        except (ValueError, UnicodeDecodeError) as e:
            raise DataError(f"{p}: not valid JSON ({e})") from None
        if doc.get("format") != REGISTRY_FORMAT or doc.get("version") != REGISTRY_VERSION:
            raise DataError(f"{p}: not a lethe study registry (version {REGISTRY_VERSION})")
        devices = {}
        for name, d in doc["devices"].items():
            devices[name] = Device(name, base64.b64decode(d["device_public_key"]), d["device_key_id"],
                                   d["policy_fingerprint"], d["enrolled"], dict(d.get("seen", {})),
                                   d.get("withdrawn"), d.get("log_origin"))
        return cls(study_dir, doc["study_id"], devices)

    def save(self) -> None:
        doc = {"format": REGISTRY_FORMAT, "version": REGISTRY_VERSION, "study_id": self.study_id,
               "devices": {k: v.to_json() for k, v in sorted(self.devices.items())}}
        write_private(self.path, (json.dumps(doc, indent=2, sort_keys=True) + "\n").encode())

    # -- lookups -------------------------------------------------------------
    def device(self, pseudonym: str) -> Device | None:
        return self.devices.get(pseudonym)

    def by_key_id(self, key_id: str) -> Device | None:
        for d in self.devices.values():
            if d.device_key_id == key_id:
                return d
        return None

    # -- changes -------------------------------------------------------------
    def add(self, enrolment: dict, source="<enrolment>") -> Device:
        """Register a verified enrolment (from :func:`agent.study.card.verify_enrolment`)."""
        if enrolment["study_id"] != self.study_id:
            raise StateError(f"{source}: [study_id] enrolment is for {enrolment['study_id']!r}, "
                             f"this study is {self.study_id!r}")
        name = enrolment["pseudonym"]
        old = self.devices.get(name)
        if old is not None:
            if old.public_bytes == enrolment["device_public_key"]:
                return old  # the same enrolment twice: nothing to do
            raise StateError(f"{source}: pseudonym {name!r} is already enrolled with device key "
                             f"{old.device_key_id}; refusing a second key for it")
        other = self.by_key_id(enrolment["device_key_id"])
        if other is not None:
            raise StateError(f"{source}: device key {enrolment['device_key_id']} is already enrolled as "
                             f"{other.pseudonym!r}")
        dev = Device(name, enrolment["device_public_key"], enrolment["device_key_id"],
                     enrolment["policy_fingerprint"], enrolment["created"],
                     log_origin=enrolment.get("log_origin"))
        self.devices[name] = dev
        return dev

    def received_path(self, pseudonym: str, seq: int) -> Path:
        return self.received_dir / pseudonym / f"{int(seq)}.json"

    def received(self):
        """Yield ``(pseudonym, seq, {"header", "payload"})`` for every opened bundle, in order."""
        base = self.received_dir
        if not base.is_dir():
            return
        for pdir in sorted(base.iterdir()):
            if not pdir.is_dir():
                continue
            files = sorted((f for f in pdir.glob("*.json") if f.stem.isdigit()), key=lambda f: int(f.stem))
            for f in files:
                yield pdir.name, int(f.stem), json.loads(f.read_text("utf-8"))


def locked(study_dir):
    """Exclusive lock on the study directory's registry for a read-modify-write."""
    return file_lock(Path(study_dir) / "registry.lock")


def enroll(study_dir, enrolment_path) -> Device:
    """Verify an enrolment file and register its device.

    The policy it names must be approved by the study's current card
    (``STUDYDIR/card.json``).
    """
    from .card import study_card

    enrolment = load_enrolment(enrolment_path)
    card = study_card(study_dir)
    if enrolment["policy_fingerprint"] not in card.approved_policies:
        raise StateError(f"{enrolment_path}: policy fingerprint {enrolment['policy_fingerprint']} is not "
                         f"approved by the study card (approved: {', '.join(card.approved_policies)})")
    with locked(study_dir):
        reg = Registry.load(study_dir)
        dev = reg.add(enrolment, source=enrolment_path)
        reg.save()
    return dev
