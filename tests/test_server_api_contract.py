"""Every JSON body the study server answers meets ``server-api.json`` (issue 16: one contract per format).

The server runs for real (uvicorn, HTTPS on loopback; ``_server_fixtures``);
the answers are checked with a plain JSON Schema 2020-12 validator from the
``jsonschema`` package, as a client written in another language would.
"""

from __future__ import annotations

import pytest
from jsonschema import Draft202012Validator

from _bundle_fixtures import make_payload
from _server_fixtures import World, database, world  # noqa: F401  (fixture)
from agent import contracts


def check(part: str, body) -> None:
    doc = contracts.schema("server-api")
    sub = {**doc["$defs"][part], "$defs": doc["$defs"]}
    errors = [e.message for e in Draft202012Validator(sub).iter_errors(body)]
    assert errors == [], (part, body)


def test_api_root_meets_the_contract(world):
    check("api-root", world.http.get("/v1").json())


def test_enrolment_answers_meet_the_contract(world):
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

    dev = Ed25519PrivateKey.generate()
    code = world.store.invite(1)[0]
    first, _, _ = world.enrol("pAaaa1111", dev, code)
    again, _, _ = world.enrol("pAaaa1111", dev, code)
    assert (first.status_code, again.status_code) == (201, 200)
    check("enrolled", first.json())
    check("enrolled", again.json())


def test_bundle_answers_meet_the_contract(world):
    _, dev, _ = world.enrol()
    data = world.study.seal(make_payload(world.study.policy), seq=1, device=dev)
    stored, again = world.post_bundle(data), world.post_bundle(data)
    assert (stored.status_code, again.status_code) == (201, 200)
    check("bundle-stored", stored.json())
    check("bundle-stored", again.json())


def test_withdrawal_answers_meet_the_contract(world):
    from agent.study.withdrawal import make_withdrawal_certificate

    _, dev, name = world.enrol()
    cert = make_withdrawal_certificate("harbour-days-2027", name, dev, {"seq": 9, "hash": "ab" * 32},
                                       {"episodes": 60})
    first, again = world.post_json("/v1/withdrawals", cert), world.post_json("/v1/withdrawals", cert)
    assert (first.status_code, again.status_code) == (201, 200)
    check("withdrawn", first.json())
    check("withdrawn", again.json())


@pytest.mark.parametrize("request_", ["garbage bundle", "unknown path", "bad json", "wrong method"])
def test_error_answers_meet_the_contract(world, request_):
    if request_ == "garbage bundle":
        r = world.post_bundle(b"hello, server")
    elif request_ == "unknown path":
        r = world.http.get("/v1/nonesuch")
    elif request_ == "bad json":
        r = world.http.post("/v1/enrolments", content=b"{not json", headers={"Content-Type": "application/json"})
    else:
        r = world.http.delete("/v1/bundles")
    assert r.status_code >= 400
    check("error", r.json())


def test_an_enrolment_request_meets_the_contract(world):
    # the shape agent/uploader.py's enqueue_enrolment posts: the code and the enrolment document
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

    from agent.study.card import make_enrolment

    doc = make_enrolment(world.study.card, world.study.policy, "pBbbb2222", Ed25519PrivateKey.generate())
    check("enrolment-request", {"invitation": world.store.invite(1)[0], "enrolment": doc})


@pytest.mark.parametrize(("body", "key"), [
    ([], "<document>"),
    ({"invitation": "x"}, "enrolment"),
    ({"invitation": "x", "enrolment": {}, "note": 1}, "note"),
    ({"invitation": 5, "enrolment": {}}, "invitation"),
    ({"invitation": "c0de" * 26, "enrolment": {}}, "invitation"),
])
def test_an_enrolment_request_off_the_contract_is_refused_naming_the_key(world, body, key):
    before = world.store.counts()
    r = world.post_json("/v1/enrolments", body)
    assert r.status_code == 400, r.text
    check("error", r.json())
    message = r.json()["error"]["message"]
    assert r.json()["error"]["code"] == "invalid" and f"[{key}]" in message
    assert "c0dec0de" not in message  # an invitation code is never echoed
    assert world.store.counts() == before
