"""The study server over real HTTPS on loopback, on SQLite and on PostgreSQL.

Every bad upload gets a 4xx with a JSON error and stores nothing (issue 13,
"Bad input and faults"); good uploads are stored once and are idempotent.
"""

from __future__ import annotations

import struct

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from _bundle_fixtures import make_payload
from _server_fixtures import World, database, world  # noqa: F401  (fixture)


def seal_for(w, device, seq=1, payload=None):
    return w.study.seal(payload or make_payload(w.study.policy), seq=seq, device=device)


def nothing_stored(w, before):
    assert w.store.counts() == before


def err(r, status, code):
    assert r.status_code == status, r.text
    body = r.json()["error"]
    assert body["status"] == status and body["code"] == code and body["message"]
    return body["message"]


# -- the good path ------------------------------------------------------------------
def test_api_root_names_study_and_version(world):
    r = world.http.get("/v1")
    assert r.json() == {"api": "lethe-study", "version": 1, "study_id": "harbour-days-2027"}


def test_enrol_then_upload_then_again(world):
    r, dev, name = world.enrol()
    assert r.status_code == 201 and r.json() == {"status": "enrolled", "pseudonym": name}
    data = seal_for(world, dev)
    r = world.post_bundle(data)
    assert r.status_code == 201 and r.json()["status"] == "stored" and r.json()["seq"] == 1
    r = world.post_bundle(data)  # idempotent
    assert r.status_code == 200 and r.json()["status"] == "already have"
    assert world.store.counts()["bundles"] == 1
    (rec,) = list(world.store.records())
    assert rec[0] == name and rec[2]["payload"]["study_id"] == "harbour-days-2027"


def test_enrolment_twice_is_already_have(world):
    dev = Ed25519PrivateKey.generate()
    code = world.store.invite(1)[0]
    r1, _, name = world.enrol("pAaaa1111", dev, code)
    r2, _, _ = world.enrol("pAaaa1111", dev, code)
    assert (r1.status_code, r2.status_code) == (201, 200) and r2.json()["status"] == "already have"


def test_withdrawal_then_bundles_refused(world):
    from agent.study.withdrawal import make_withdrawal_certificate

    r, dev, name = world.enrol()
    assert world.post_bundle(seal_for(world, dev, 1)).status_code == 201
    cert = make_withdrawal_certificate("harbour-days-2027", name, dev, {"seq": 9, "hash": "ab" * 32},
                                       {"episodes": 60})
    r = world.post_json("/v1/withdrawals", cert)
    assert r.status_code == 201 and r.json()["status"] == "withdrawn"
    assert world.post_json("/v1/withdrawals", cert).json()["status"] == "already have"
    before = world.store.counts()
    err(world.post_bundle(seal_for(world, dev, 2)), 410, "withdrawn")
    nothing_stored(world, before)
    assert world.store.participants() == []  # left out of analyses
    assert [p["pseudonym"] for p in world.store.participants(include_withdrawn=True)] == [name]


# -- bad enrolments -------------------------------------------------------------------
def test_enrolment_without_a_known_invitation(world):
    before = world.store.counts()
    r, _, _ = world.enrol(code="0000-0000-0000")
    err(r, 403, "invitation_unknown")
    nothing_stored(world, before)


def test_invitation_used_by_another_device(world):
    code = world.store.invite(1)[0]
    assert world.enrol(code=code)[0].status_code == 201
    before = world.store.counts()
    err(world.enrol(code=code)[0], 403, "invitation_used")
    nothing_stored(world, before)


def test_enrolment_with_a_bad_signature(world):
    from agent.study.card import make_enrolment

    doc = make_enrolment(world.study.card, world.study.policy, "pBbbb2222", Ed25519PrivateKey.generate())
    doc["pseudonym"] = "pCccc3333"  # changed after signing
    before = world.store.counts()
    err(world.post_json("/v1/enrolments", {"invitation": world.store.invite(1)[0], "enrolment": doc}),
        422, "verification_failed")
    before["invited"] += 1
    nothing_stored(world, before)


def test_enrolment_malformed_json(world):
    before = world.store.counts()
    r = world.http.post("/v1/enrolments", content=b"{not json", headers={"Content-Type": "application/json"})
    assert "not valid JSON" in err(r, 400, "invalid")
    nothing_stored(world, before)


# -- bad bundles ----------------------------------------------------------------------
def test_bundle_garbage(world):
    before = world.store.counts()
    assert "bad magic" in err(world.post_bundle(b"hello, server"), 400, "invalid")
    nothing_stored(world, before)


def test_bundle_wrongly_signed(world):
    _, dev, _ = world.enrol()
    data = bytearray(seal_for(world, dev))
    data[-1] ^= 1
    before = world.store.counts()
    assert "signature" in err(world.post_bundle(bytes(data)), 422, "verification_failed")
    nothing_stored(world, before)


def test_bundle_from_unenrolled_device(world):
    before = world.store.counts()
    err(world.post_bundle(seal_for(world, Ed25519PrivateKey.generate())), 403, "not_enrolled")
    nothing_stored(world, before)


def test_bundle_replayed_sequence_number(world):
    _, dev, _ = world.enrol()
    assert world.post_bundle(seal_for(world, dev, 1)).status_code == 201
    before = world.store.counts()
    err(world.post_bundle(seal_for(world, dev, 1)), 409, "replayed")  # same number, other bytes
    nothing_stored(world, before)


def test_bundle_future_format_version(world):
    _, dev, _ = world.enrol()
    data = bytearray(seal_for(world, dev))
    data[8:10] = struct.pack(">H", 9)
    before = world.store.counts()
    assert "newer" in err(world.post_bundle(bytes(data)), 400, "unsupported_version")
    nothing_stored(world, before)


def test_bundle_nested_payload(world):
    from test_study_open_failclosed import seal_raw

    r, dev, name = world.enrol()
    world.study.device = dev
    before = world.store.counts()
    msg = err(world.post_bundle(seal_raw(world.study, b"[" * 40000 + b"]" * 40000)), 400, "invalid")
    assert "nested too deeply" in msg
    nothing_stored(world, before)


def raw_request(w, head: bytes, body: bytes = b"") -> tuple[int, dict]:
    """Send bytes over a pinned TLS socket (httpx will not send a body shorter than its Content-Length)."""
    import json
    import socket

    from agent.uploader import pinned_context

    ctx = pinned_context(w.srv.url, w.srv.pin)
    with socket.create_connection(("127.0.0.1", w.srv.port), timeout=30) as raw, \
            ctx.wrap_socket(raw, server_hostname="127.0.0.1") as s:
        s.sendall(head + body)
        data = b""
        while b"\r\n\r\n" not in data or len(data.split(b"\r\n\r\n", 1)[1]) < int(
                [ln.split(b":")[1] for ln in data.split(b"\r\n") if ln.lower().startswith(b"content-length")][0]):
            chunk = s.recv(65536)
            if not chunk:
                break
            data += chunk
    status = int(data.split(b" ", 2)[1])
    return status, json.loads(data.split(b"\r\n\r\n", 1)[1])


def test_bundle_declared_too_large_is_not_read(world):
    # A 1 TB Content-Length with 100 bytes behind it: answered 413 from the header alone.
    before = world.store.counts()
    status, body = raw_request(world, b"POST /v1/bundles HTTP/1.1\r\nHost: x\r\nContent-Type: "
                                      b"application/octet-stream\r\nContent-Length: 1000000000000\r\n\r\n", b"x" * 100)
    assert status == 413 and body["error"]["code"] == "too_large" and "nothing was read" in body["error"]["message"]
    nothing_stored(world, before)


def test_bundle_longer_than_the_limit_is_cut(tmp_path):
    with database("sqlite", tmp_path) as url:
        w = World(tmp_path, url, max_bundle_bytes=4096)
        try:
            before = w.store.counts()
            assert "more than the limit" in err(w.post_bundle(b"\x89LETHE\r\n" + b"\0" * 5000), 413, "too_large")
            nothing_stored(w, before)
        finally:
            w.close()


def test_bundle_without_length_is_refused(world):
    def gen():
        yield b"\x89LETHE\r\n"

    before = world.store.counts()
    r = world.http.post("/v1/bundles", content=gen(), headers={"Content-Type": "application/octet-stream"})
    err(r, 411, "length_required")
    nothing_stored(world, before)


def test_bundle_wrong_content_type(world):
    err(world.http.post("/v1/bundles", content=b"x", headers={"Content-Type": "text/plain"}),
        415, "unsupported_media_type")


def test_unknown_endpoint_is_json_404(world):
    err(world.http.get("/v2/bundles"), 404, "not_found")


def test_rate_limited_per_device(tmp_path):
    with database("sqlite", tmp_path) as url:
        w = World(tmp_path, url, rate_per_minute=1, rate_burst=2)
        try:
            _, dev, _ = w.enrol()
            codes = [w.post_bundle(seal_for(w, dev, s)).status_code for s in (1, 2, 3)]
            assert codes == [201, 201, 429]
            r = w.post_bundle(seal_for(w, dev, 3))
            assert r.status_code == 429 and int(r.headers["retry-after"]) >= 1
            # another device is not slowed down by the first one
            _, dev2, _ = w.enrol()
            assert w.post_bundle(seal_for(w, dev2, 1)).status_code == 201
        finally:
            w.close()
