"""Bundles: the sealed, signed container in which a payload leaves the device.

Byte layout (all integers big-endian; full specification in ``docs/bundle-format.md``)::

    offset      size  field
    0           8     magic            89 4C 45 54 48 45 0D 0A   ("\\x89LETHE\\r\\n")
    8           2     format version   uint16, = 1
    10          4     H                uint32, header length, 2 .. 65536
    14          H     header           canonical JSON (UTF-8)
    14+H        2     E                uint16, HPKE enc length (the suite's Nenc)
    16+H        E     enc              HPKE encapsulated key
    16+H+E      4     C                uint32, ciphertext length, 16 .. 64 MiB
    20+H+E      C     ciphertext       HPKE single-shot seal (mode_base) of the canonical
                                       JSON payload, info = header bytes, aad = empty
    20+H+E+C    64    signature        Ed25519 (RFC 8032) by the device key over bytes 0 .. 20+H+E+C

The reader checks, in this order and each with its own message: magic, format
version (a newer one is refused as such), framing and length, the signature
against the enrolled device, the authenticated header, the HPKE open (AEAD
tag), the payload schema, the policy's approval, and the sequence number.
Nothing is trusted before the signature and the AEAD tag verify, and nothing
is written when any check fails.
"""

from __future__ import annotations

import hashlib
import re
import struct
from contextlib import suppress
from dataclasses import dataclass

from .errors import DataError, IntegrityError, StateError
from .canonical import dumps as canonical_json
from .hpke_suites import enc_length, suite_of
from .contracts import schema as _contract

MAGIC = b"\x89LETHE\r\n"
# The payload schema version a header must name (the payload contract's own constant).
PAYLOAD_SCHEMA: int = _contract("payload")["properties"]["schema"]["const"]
FORMAT_VERSION = 1
HEADER_FORMAT = "lethe-bundle"
MAX_HEADER = 65536
MAX_CIPHERTEXT = 64 * 1024 * 1024
SIG_LEN = 64
SUFFIX = ".lethe"
# The largest file the framing allows: magic, version, H, header, E, enc, C, ciphertext, signature.
# Readers check a file's size against it before reading a byte.
MAX_BUNDLE_BYTES = 8 + 2 + 4 + MAX_HEADER + 2 + 0xFFFF + 4 + MAX_CIPHERTEXT + SIG_LEN
MAX_PAYLOAD_DEPTH = 8  # the schema's deepest value is model.cv.folds[i].<metric>.ci[j] (depth 6)

HEADER_FIELDS = ("format", "version", "suite", "study_id", "recipient", "device_key_id", "seq",
                 "created", "payload_schema")


class FormatVersionError(DataError):
    """A bundle written by a newer lethe (its own error, so callers can say 'upgrade')."""


# ----------------------------------------------------------------------------- header
def make_header(*, suite: str, study_id: str, recipient: str, device_key_id: str, seq: int,
                created: str, payload_schema: int = PAYLOAD_SCHEMA) -> dict:
    return {"format": HEADER_FORMAT, "version": FORMAT_VERSION, "suite": suite, "study_id": study_id,
            "recipient": recipient, "device_key_id": device_key_id, "seq": int(seq), "created": created,
            "payload_schema": int(payload_schema)}


def check_header(h, source: str) -> dict:
    """Strict header check against ``bundle-header.json`` (run only on the authenticated header)."""
    from .contracts import validate

    if not isinstance(h, dict):
        raise DataError(f"{source}: header is not a JSON object")
    validate("bundle-header", h, source, error=lambda src, key, msg: DataError(f"{src}: header [{key}] {msg}"))
    if h["version"] != FORMAT_VERSION:
        raise DataError(f"{source}: header [format/version] {h['format']!r} v{h['version']!r} does not match "
                        f"the container (lethe-bundle v{FORMAT_VERSION})")
    if h["payload_schema"] != PAYLOAD_SCHEMA:
        raise DataError(f"{source}: header [payload_schema] {h['payload_schema']!r} is not supported "
                        f"(this lethe reads payload schema {PAYLOAD_SCHEMA})")
    return h


# ----------------------------------------------------------------------------- seal and sign
def seal_bundle(payload: dict, header: dict, recipient_public_key, device_key) -> bytes:
    """Serialise, seal (HPKE, header as info) and sign (Ed25519) a bundle; returns its bytes."""

    header_bytes = canonical_json(header)
    if not 2 <= len(header_bytes) <= MAX_HEADER:
        raise DataError(f"bundle header of {len(header_bytes)} bytes is out of range")
    sealed = suite_of(header["suite"]).encrypt(canonical_json(payload), recipient_public_key,
                                               info=header_bytes)
    n_enc = enc_length(header["suite"])
    enc, ct = sealed[:n_enc], sealed[n_enc:]
    body = b"".join([MAGIC, struct.pack(">HI", FORMAT_VERSION, len(header_bytes)), header_bytes,
                     struct.pack(">H", len(enc)), enc, struct.pack(">I", len(ct)), ct])
    return body + device_key.sign(body)


@dataclass
class Parts:
    """A bundle split along its framing (nothing in it authenticated yet)."""

    version: int
    header_bytes: bytes
    enc: bytes
    ciphertext: bytes
    signed: bytes
    signature: bytes


def split_bundle(data: bytes, source: str = "<bundle>") -> Parts:
    """Check magic, version and framing; return the parts (unauthenticated)."""
    if len(data) < len(MAGIC) or data[: len(MAGIC)] != MAGIC:
        raise DataError(f"{source}: not a lethe bundle (bad magic bytes)")
    if len(data) < 10:
        raise IntegrityError(f"{source}: truncated bundle: {len(data)} bytes, too short for the version field")
    (version,) = struct.unpack(">H", data[8:10])
    if version > FORMAT_VERSION:
        raise FormatVersionError(f"{source}: bundle format version {version} is newer than this lethe reads "
                                 f"(version {FORMAT_VERSION}); upgrade lethe to open it")
    if version != FORMAT_VERSION:
        raise DataError(f"{source}: bundle format version {version} is not supported "
                        f"(this lethe reads {FORMAT_VERSION})")
    pos = 10

    def take(n, what):
        nonlocal pos
        if pos + n > len(data):
            raise IntegrityError(f"{source}: truncated bundle: {what} needs {n} bytes at offset {pos}, "
                                 f"the file has {len(data)} bytes")
        chunk = data[pos: pos + n]
        pos += n
        return chunk

    (h_len,) = struct.unpack(">I", take(4, "header length"))
    if not 2 <= h_len <= MAX_HEADER:
        raise IntegrityError(f"{source}: header length {h_len} is out of range (2..{MAX_HEADER})")
    header_bytes = take(h_len, "header")
    (e_len,) = struct.unpack(">H", take(2, "enc length"))
    enc = take(e_len, "HPKE enc")
    (c_len,) = struct.unpack(">I", take(4, "ciphertext length"))
    if not 16 <= c_len <= MAX_CIPHERTEXT:
        raise IntegrityError(f"{source}: ciphertext length {c_len} is out of range (16..{MAX_CIPHERTEXT})")
    ct = take(c_len, "ciphertext")
    signed_end = pos
    sig = take(SIG_LEN, "signature")
    if pos != len(data):
        raise IntegrityError(f"{source}: {len(data) - pos} unexpected bytes after the signature")
    return Parts(version, header_bytes, enc, ct, data[:signed_end], sig)


# ----------------------------------------------------------------------------- read and verify
@dataclass
class OpenedBundle:
    header: dict
    payload: dict
    pseudonym: str
    sha256: str


def _verify_sig(dev, parts: Parts) -> bool:
    from cryptography.exceptions import InvalidSignature

    try:
        dev.public_key().verify(parts.signature, parts.signed)
        return True
    except InvalidSignature:
        return False


def read_bundle(data: bytes, *, registry, study_key, approved_policies, source: str = "<bundle>") -> OpenedBundle:
    """Verify and open a bundle.  Raises on the first failed check; writes nothing.

    Parameters
    ----------
    data : bytes
        The bundle file's bytes.
    registry : agent.study.registry.Registry
        Enrolled devices and the sequence numbers already seen.
    study_key : agent.study.keys.StudyKeyPair
    approved_policies : collection of str
        Policy fingerprints the study card approves.
    """
    from cryptography.exceptions import InvalidTag

    from .export.payload import validate_payload
    from .study.bounded import loads_bounded

    parts = split_bundle(data, source)

    # Which device?  The header is not trusted yet: it only picks the candidate key.
    # If it cannot be parsed, or names no enrolled device, every enrolled key is tried,
    # so a damaged header reads as a signature failure, not as "unknown device".
    claimed = None
    with suppress(DataError, AttributeError):
        claimed = loads_bounded(parts.header_bytes, source, "bundle header", max_depth=1).get("device_key_id")
    candidate = registry.by_key_id(claimed) if isinstance(claimed, str) else None
    if candidate is not None:
        device = candidate if _verify_sig(candidate, parts) else None
    else:
        device = next((d for d in registry.devices.values() if _verify_sig(d, parts)), None)
        if device is None and isinstance(claimed, str) and _header_parses(parts):
            raise StateError(f"{source}: signed by a device that is not enrolled in study "
                             f"{registry.study_id!r} (header names device key {claimed}); "
                             f"register its enrolment file first ('lethe study enroll')")
    if device is None:
        who = f"enrolled device {candidate.pseudonym!r}" if candidate is not None else "any enrolled device"
        raise IntegrityError(f"{source}: Ed25519 signature does not verify against {who}: the header, "
                             f"ciphertext or signature was altered, or it was signed by another key")

    if device.withdrawn:
        raise StateError(f"{source}: participant {device.pseudonym!r} withdrew on {device.withdrawn}; "
                         f"their bundles are no longer opened")

    # From here the header bytes are authentic.
    header = check_header(loads_bounded(parts.header_bytes, source, "the signed header", max_depth=1), source)
    if parts.header_bytes != canonical_json(header):
        raise DataError(f"{source}: header is not in canonical JSON form")
    if header["device_key_id"] != device.device_key_id:
        raise IntegrityError(f"{source}: header names device {header['device_key_id']} but was signed by "
                             f"{device.device_key_id}")
    if header["study_id"] != registry.study_id:
        raise StateError(f"{source}: bundle is for study {header['study_id']!r}, this is {registry.study_id!r}")
    if header["recipient"] != study_key.fingerprint or header["suite"] != study_key.suite:
        raise StateError(f"{source}: sealed to study key {header['recipient']} ({header['suite']}), "
                         f"not to this study's key {study_key.fingerprint} ({study_key.suite})")
    if len(parts.enc) != enc_length(header["suite"]):
        raise IntegrityError(f"{source}: HPKE enc has {len(parts.enc)} bytes, the {header['suite']} suite "
                             f"uses {enc_length(header['suite'])}")
    try:
        plaintext = suite_of(header["suite"]).decrypt(parts.enc + parts.ciphertext, study_key.private_key(),
                                                      info=parts.header_bytes)
    except (InvalidTag, ValueError):
        raise IntegrityError(f"{source}: HPKE open failed (AEAD tag does not verify): the ciphertext was not "
                             f"sealed to this study key under this header") from None

    payload = loads_bounded(plaintext, source, "payload", max_depth=MAX_PAYLOAD_DEPTH)
    validate_payload(payload, source)
    if payload["study_id"] != header["study_id"] or payload["created"] != header["created"]:
        raise DataError(f"{source}: payload [study_id/created] disagrees with the header")
    fp = payload["policy_fingerprint"]
    if fp not in set(approved_policies):
        raise StateError(f"{source}: collected under policy {fp}, which the study card does not approve "
                         f"(approved: {', '.join(sorted(approved_policies))})")
    digest = hashlib.sha256(data).hexdigest()
    seen = device.seen.get(str(header["seq"]))
    if seen is not None:
        if seen == digest:
            raise StateError(f"{source}: duplicate: bundle #{header['seq']} of {device.pseudonym} was already opened")
        raise StateError(f"{source}: replayed sequence number: {device.pseudonym} already sent a different "
                         f"bundle #{header['seq']}; refusing the second one")
    return OpenedBundle(header, payload, device.pseudonym, digest)


def _header_parses(parts: Parts) -> bool:
    from .study.bounded import loads_bounded

    try:
        h = loads_bounded(parts.header_bytes, "<header>", "bundle header", max_depth=1)
        return isinstance(h, dict) and set(h) == set(HEADER_FIELDS)
    except DataError:
        return False


# ----------------------------------------------------------------------------- naming
def bundle_name(seq: int, pseudonym: str | None = None) -> str:
    """``<pseudonym>-<seq, 6 digits>.lethe``, so bundles of many participants can share a folder.

    Without a pseudonym (a home enrolled before pseudonyms were kept) the name
    is ``bundle-<seq>.lethe`` as before.
    """
    if pseudonym and re.fullmatch(r"[A-Za-z0-9_-]{1,64}", pseudonym):
        return f"{pseudonym}-{int(seq):06d}{SUFFIX}"
    return f"bundle-{int(seq):06d}{SUFFIX}"

