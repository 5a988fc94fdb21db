"""What every upload goes through before anything is stored.

The checks are the ones ``lethe study open`` runs (:func:`agent.bundle.read_bundle`:
framing, signature against the enrolled device, header, HPKE open, payload
schema with bounded JSON, approved policy, sequence number and replay), plus
the device ledger's continuity against the device's previous bundle, plus the
invitation for an enrolment.  Each function returns ``(http_status, body)``
on success and raises :class:`UploadError` (status, stable code, message) on
refusal; a refused upload writes nothing.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from typing import Any

import sqlalchemy as sa

from ...errors import DataError, IntegrityError, LetheError, StateError
from .store import Store, bundles_t, code_hash, devices_t, invitations_t, now_utc, withdrawals_t


class UploadError(LetheError):
    """A refused upload: HTTP ``status``, a stable ``code`` and a message for people."""

    def __init__(self, status: int, code: str, message: str):
        super().__init__(message)
        self.status = status
        self.code = code


def classify(e: LetheError) -> UploadError:
    """Map a verification error to its HTTP status and code (docs/server.md, "Status codes")."""
    from ...bundle import FormatVersionError

    if isinstance(e, UploadError):
        return e
    msg = str(e)
    if isinstance(e, FormatVersionError):
        return UploadError(400, "unsupported_version", msg)
    if isinstance(e, IntegrityError):
        return UploadError(422, "verification_failed", msg)
    if isinstance(e, StateError):
        if "not enrolled" in msg:
            return UploadError(403, "not_enrolled", msg)
        if "withdrew" in msg or "withdrawn" in msg:
            return UploadError(410, "withdrawn", msg)
        if "replayed" in msg:
            return UploadError(409, "replayed", msg)
        return UploadError(409, "conflict", msg)
    if isinstance(e, DataError):
        return UploadError(400, "invalid", msg)
    return UploadError(400, "invalid", msg)


@dataclass
class StudyContext:
    """What the server verifies against: the study key, the card's approved policies, the database."""

    study_id: str
    study_key: Any
    card: Any
    store: Store


def log_continuity(previous: dict | None, current: dict, origin: str | None) -> list[str]:
    """Problems with the device ledger's continuity from the previous bundle to this one.

    The same rule as ``lethe study open`` (:func:`agent.study.open.check_continuity`):
    :func:`agent.ledger.verify.verify_log_continuity` on the two payloads' ``log``
    sections and the log origin from the device's enrolment; a device whose
    bundles never carried a log section (before ledger format 2) is not checked.
    """
    from ...ledger.verify import verify_log_continuity

    prev = previous.get("log") if previous else None
    cur: Any = current.get("log")
    if cur is None and prev is None and origin is None:
        return []
    return verify_log_continuity(prev, cur, origin=origin)


def claimed_sender(data: bytes) -> tuple[str | None, int | None]:
    """The device key id and sequence number the (not yet authenticated) header names."""
    from ...bundle import split_bundle
    from ..bounded import loads_bounded

    try:
        h = loads_bounded(split_bundle(data, "<upload>").header_bytes, "<upload>", "bundle header", max_depth=1)
    except LetheError:
        return None, None
    if not isinstance(h, dict):
        return None, None
    kid, seq = h.get("device_key_id"), h.get("seq")
    return (kid if isinstance(kid, str) else None,
            seq if isinstance(seq, int) and not isinstance(seq, bool) and 0 < seq < 2**53 else None)


def accept_bundle(ctx: StudyContext, data: bytes, source: str) -> tuple[int, dict]:
    from ...bundle import read_bundle
    from .store import OneDeviceRegistry

    sha = hashlib.sha256(data).hexdigest()
    have = ctx.store.bundle_by_sha(sha)
    if have is not None:
        return 200, {"status": "already have", **have, "sha256": sha}
    kid, seq = claimed_sender(data)
    dev = ctx.store.device_by_key_id(kid, seq) if kid else None
    try:
        opened = read_bundle(data, registry=OneDeviceRegistry(ctx.study_id, dev), study_key=ctx.study_key,
                             approved_policies=ctx.card.approved_policies, source=source)
    except LetheError as e:
        raise classify(e) from None
    seq = opened.header["seq"]
    problems = log_continuity(ctx.store.previous_payload(opened.pseudonym, seq), opened.payload,
                              dev.log_origin if dev else None)
    if problems:
        raise UploadError(422, "ledger_discontinuity", f"{source}: " + "; ".join(problems))
    row = {"pseudonym": opened.pseudonym, "seq": seq, "sha256": sha, "created": opened.header["created"],
           "received_at": now_utc(), "header": json.dumps(opened.header, sort_keys=True),
           "payload": json.dumps(opened.payload, sort_keys=True)}
    try:
        with ctx.store.write() as c:
            withdrawn = c.execute(sa.select(devices_t.c.withdrawn).where(
                devices_t.c.pseudonym == opened.pseudonym)).scalar()
            if withdrawn:
                raise UploadError(410, "withdrawn", f"{source}: participant {opened.pseudonym!r} withdrew on "
                                                    f"{withdrawn}; their bundles are no longer accepted")
            c.execute(bundles_t.insert(), [row])
    except sa.exc.IntegrityError:
        # A concurrent upload of the same number won the race: the same bytes are "already have".
        again = ctx.store.bundle_by_sha(sha)
        if again is not None:
            return 200, {"status": "already have", **again, "sha256": sha}
        raise UploadError(409, "replayed", f"{source}: replayed sequence number: {opened.pseudonym} already "
                                           f"sent a different bundle #{seq}; refusing the second one") from None
    return 201, {"status": "stored", "pseudonym": opened.pseudonym, "seq": seq, "sha256": sha}


def accept_enrolment(ctx: StudyContext, doc, source: str) -> tuple[int, dict]:
    from ..card import verify_enrolment

    from ... import contracts

    # the request's shape is the server-api contract's "enrolment-request" part
    for key, message in contracts.iter_problems("server-api", doc, part="enrolment-request"):
        if key == "invitation":  # never echo a code (it may be a real one, slightly mistyped)
            message = "expected the invitation code as a string of 1-100 characters"
        raise UploadError(400, "invalid", f"{source}: [{key or '<document>'}] {message}")
    code = doc["invitation"]
    try:
        e = verify_enrolment(doc["enrolment"], source)
    except LetheError as err:
        raise classify(err) from None
    if e["study_id"] != ctx.study_id:
        raise UploadError(409, "wrong_study", f"{source}: [study_id] enrolment is for {e['study_id']!r}, this "
                                              f"server is study {ctx.study_id!r}")
    if e["policy_fingerprint"] not in ctx.card.approved_policies:
        raise UploadError(409, "policy_not_approved", f"{source}: policy fingerprint {e['policy_fingerprint']} is "
                                                      f"not approved by the study card")
    h = code_hash(code)
    with ctx.store.write() as c:
        old = c.execute(sa.select(devices_t).where(devices_t.c.pseudonym == e["pseudonym"])).mappings().first()
        if old is not None:
            if bytes(old["public_key"]) == e["device_public_key"]:
                return 200, {"status": "already have", "pseudonym": e["pseudonym"]}
            raise UploadError(409, "conflict", f"{source}: pseudonym {e['pseudonym']!r} is already enrolled "
                                               f"with another device key")
        inv = c.execute(sa.select(invitations_t).where(invitations_t.c.code_sha256 == h)).mappings().first()
        if inv is None:
            raise UploadError(403, "invitation_unknown", f"{source}: the invitation code is not one this study "
                                                         f"issued ('lethe study invite')")
        if inv["used_at"] is not None:
            raise UploadError(403, "invitation_used", f"{source}: the invitation code was already used on "
                                                      f"{inv['used_at']}; each code enrols one device")
        other = c.execute(sa.select(devices_t.c.pseudonym).where(
            devices_t.c.device_key_id == e["device_key_id"])).scalar()
        if other is not None:
            raise UploadError(409, "conflict", f"{source}: device key {e['device_key_id']} is already enrolled "
                                               f"as {other!r}")
        c.execute(devices_t.insert(), [{"pseudonym": e["pseudonym"], "device_key_id": e["device_key_id"],
                                        "public_key": e["device_public_key"],
                                        "policy_fingerprint": e["policy_fingerprint"], "enrolled": e["created"],
                                        "enrolled_at": now_utc(), "withdrawn": None,
                                        "log_origin": e.get("log_origin")}])
        c.execute(invitations_t.update().where(invitations_t.c.code_sha256 == h).values(
            used_at=now_utc(), used_by=e["pseudonym"]))
    return 201, {"status": "enrolled", "pseudonym": e["pseudonym"]}


def accept_withdrawal(ctx: StudyContext, cert, source: str) -> tuple[int, dict]:
    from ..withdrawal import verify_withdrawal_signature

    if not isinstance(cert, dict) or not isinstance(cert.get("pseudonym"), str):
        raise UploadError(400, "invalid", f"{source}: expected a withdrawal certificate (a JSON object "
                                          f"naming a pseudonym)")
    if cert.get("study_id") != ctx.study_id:
        raise UploadError(409, "wrong_study", f"{source}: [study_id] {cert.get('study_id')!r} is not this "
                                              f"study ({ctx.study_id!r})")
    dev = ctx.store.device(cert["pseudonym"])
    if dev is None:
        raise UploadError(403, "not_enrolled", f"{source}: [pseudonym] {cert['pseudonym']!r} is not enrolled "
                                               f"in study {ctx.study_id!r}")
    try:
        check = verify_withdrawal_signature(cert, dev.public_bytes, source)
    except LetheError as e:
        raise classify(e) from None
    text = json.dumps(cert, sort_keys=True)
    with ctx.store.write() as c:
        old = c.execute(sa.select(withdrawals_t.c.certificate).where(
            withdrawals_t.c.pseudonym == check.pseudonym)).scalar()
        if old is not None:
            return 200, {"status": "already have", "pseudonym": check.pseudonym, "withdrawn": dev.withdrawn}
        c.execute(withdrawals_t.insert(), [{"pseudonym": check.pseudonym, "time": check.time,
                                            "received_at": now_utc(), "certificate": text}])
        c.execute(devices_t.update().where(devices_t.c.pseudonym == check.pseudonym).values(withdrawn=check.time))
    return 201, {"status": "withdrawn", "pseudonym": check.pseudonym, "time": check.time}
