"""The ledger-entry contract (agent/contracts/schemas/ledger-entry.json) and the entry versions.

Version 2 entries hash the RFC 8785 canonical form; the reference used here is
the ``rfc8785`` package itself.  Version 1 entries (sorted-key JSON) must still
verify: ``tests/data/ledger-v1/`` is a ledger written by lethe before version 2
(``make_v1.py`` there says how), frozen byte for byte.  Each failure case is its
own test; entries that break the contract are written by hand and correctly
chained, hashed and signed with the device key, so the contract is the only
thing they fail.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import pytest
import rfc8785
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from jsonschema import Draft202012Validator

from agent import contracts
from stepping_clock import T0
from stepping_clock import SteppingClock as Clock

from agent.keystore import Keystore
from agent.ledger import LEDGER_EVENTS, ZERO_HASH, EventError, Ledger, verify_ledger

V1 = Path(__file__).resolve().parent / "data" / "ledger-v1"
V1_KEY = Ed25519PrivateKey.from_private_bytes(
    hashlib.sha256(b"lethe ledger v1 fixture (a test key, not a secret)").digest())
SCHEMA = Path(__file__).resolve().parent.parent / "agent" / "contracts" / "schemas" / "ledger-entry.json"
IT = "0123456789abcdef0123456789abcdef"


@pytest.fixture
def keys(home):
    return Keystore(home).ensure()


@pytest.fixture
def ledger(home, keys):
    lg = Ledger(home, keys.device_key(), clock=Clock())
    lg.append("agent_start", version="0.1.0")
    return lg


def sign_line(key, body: dict, version: int = 2) -> bytes:
    """A correctly hashed and signed entry line for ``body`` (which holds v, seq, prev, t, event, fields)."""
    body = dict(body, v=version)
    if version == 2:
        form = rfc8785.dumps(body)  # RFC 8785 (JCS), the reference package
    else:
        form = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()
    h = hashlib.sha256(form).hexdigest()
    entry = {**body, "hash": h, "sig": key.sign(bytes.fromhex(h)).hex()}
    return json.dumps(entry, separators=(",", ":")).encode() + b"\n"


def add_raw(home, keys, event: str, fields: dict, *, version: int = 2) -> int:
    """Append a hand-made entry after the last one (chained, hashed, signed); returns its seq."""
    last = json.loads(home.ledger_path.read_bytes().splitlines()[-1])
    seq = last["seq"] + 1
    line = sign_line(keys.device_key(), {"seq": seq, "prev": last["hash"], "t": last["t"] + 1, "event": event,
                                         **fields}, version)
    with open(home.ledger_path, "ab") as f:
        f.write(line)
    return seq


def schema_messages(home):
    r = verify_ledger(home, retention_limit_s=60, now=T0 + 100)
    return [p["message"] for p in r.problems if p["check"] != "anchor"], r


# -- the schema document --------------------------------------------------------------

def test_schema_is_a_valid_2020_12_schema():
    # checked against the draft 2020-12 meta-schema by jsonschema, an independent validator
    Draft202012Validator.check_schema(json.loads(SCHEMA.read_text("utf-8")))


def test_schema_has_one_part_per_event():
    doc = json.loads(SCHEMA.read_text("utf-8"))
    assert sorted(k[len("event-"):] for k in doc["$defs"] if k.startswith("event-")) == sorted(LEDGER_EVENTS)


def test_every_written_entry_meets_the_whole_schema_off_the_shelf(home, ledger):
    # What a reader in another language does: the whole entry against the file, no lethe code.
    ledger.append_many([("received", dict(item=IT, kind="audio", bytes=10, complete_at=T0)),
                        ("featurised", dict(item=IT, kind="audio", rows=1))])
    ledger.append("destroyed", item=IT, kind="audio", complete_at=T0, exposure_s=1.5)
    ledger.append("paused", until=None)
    ledger.append("coded", counts={"place": 2})
    v = Draft202012Validator(json.loads(SCHEMA.read_text("utf-8")))
    for line in home.ledger_path.read_bytes().splitlines():
        assert list(v.iter_errors(json.loads(line))) == []


def test_whole_schema_refuses_an_unknown_member():
    v = Draft202012Validator(json.loads(SCHEMA.read_text("utf-8")))
    entry = {"v": 2, "seq": 0, "prev": ZERO_HASH, "t": T0, "event": "resumed", "path": "/home/a/x.wav",
             "hash": ZERO_HASH, "sig": "0" * 128}
    assert [e.validator for e in v.iter_errors(entry)] == ["additionalProperties"]


def test_whole_schema_refuses_version_3():
    v = Draft202012Validator(json.loads(SCHEMA.read_text("utf-8")))
    entry = {"v": 3, "seq": 0, "prev": ZERO_HASH, "t": T0, "event": "resumed", "hash": ZERO_HASH, "sig": "0" * 128}
    assert [e.validator for e in v.iter_errors(entry)] == ["enum"]


# -- the writer refuses what the contract refuses ---------------------------------------

def test_writer_error_is_a_lethe_error_and_names_event_field_expectation(ledger):
    with pytest.raises(EventError, match=r"event 'featurised': \[rows\] expected a non-negative integer, got -1"):
        ledger.append("featurised", item=IT, kind="audio", rows=-1)


def test_writer_refuses_a_float_count(ledger):
    with pytest.raises(EventError, match=r"\[bytes\] expected a non-negative integer, got 1.5"):
        ledger.append("received", item=IT, kind="audio", bytes=1.5, complete_at=T0)


def test_writer_refuses_a_bool_count(ledger):
    with pytest.raises(EventError, match=r"\[rows\] expected a non-negative integer"):
        ledger.append("featurised", item=IT, kind="audio", rows=True)


def test_writer_refuses_a_negative_time(ledger):
    with pytest.raises(EventError, match=r"\[complete_at\] expected Unix seconds"):
        ledger.append("received", item=IT, kind="audio", bytes=1, complete_at=-5.0)


def test_writer_refuses_a_count_beyond_rfc8785_integers(ledger):
    # RFC 8785 section 3.2.2.3 (I-JSON): integers beyond 2**53 - 1 are not exact in IEEE 754 doubles
    with pytest.raises(EventError, match=r"\[bytes\]"):
        ledger.append("received", item=IT, kind="audio", bytes=2 ** 53, complete_at=T0)


def test_writer_refuses_a_bad_label(ledger):
    with pytest.raises(EventError, match=r"\[version\] expected a short label"):
        ledger.append("agent_start", version="0.1 beta")


def test_writer_refuses_a_bad_digest(ledger):
    with pytest.raises(EventError, match=r"\[digest\] expected 64 lowercase hex digits"):
        ledger.append("exported", bundle_seq=1, digest="AB" * 32)


def test_writer_refuses_a_bad_counts_key(ledger):
    with pytest.raises(EventError, match=r"\[counts.Place\] unexpected key: expected a short code"):
        ledger.append("coded", counts={"Place": 1})


def test_writer_refuses_a_bad_counts_value(ledger):
    with pytest.raises(EventError, match=r"\[counts.place\] expected a non-negative integer"):
        ledger.append("coded", counts={"place": -1})


def test_writer_refuses_a_string_until(ledger):
    with pytest.raises(EventError, match=r"\[until\] expected Unix seconds \(a number >= 0\) or null"):
        ledger.append("paused", until="tomorrow")


def test_group_append_refuses_the_whole_group_on_one_bad_event(home, ledger):
    before = home.ledger_path.read_bytes()
    with pytest.raises(EventError, match=r"event 'destroyed': \[exposure_s\]"):
        ledger.append_many([("received", dict(item=IT, kind="audio", bytes=1, complete_at=T0)),
                            ("destroyed", dict(item=IT, kind="audio", complete_at=T0, exposure_s="1"))])
    assert home.ledger_path.read_bytes() == before


def test_numpy_counts_inside_a_mapping_are_accepted(ledger):
    import numpy as np

    e = ledger.append("coded", counts={"place": np.int64(3)})
    assert e["counts"] == {"place": 3} and type(e["counts"]["place"]) is int


def test_writer_normalises_types_as_the_schema_names_them(ledger):
    e = ledger.append("received", item=IT, kind="gps", bytes=10, complete_at=1_790_000_000)
    assert type(e["complete_at"]) is float and type(e["bytes"]) is int


# -- the verifier checks authenticated content against the contract ---------------------

def test_authentic_entry_with_a_file_name_as_item_is_a_schema_problem(home, keys, ledger):
    seq = add_raw(home, keys, "rejected", {"item": "snd_0930.wav", "kind": "audio", "reason": "truncated"})
    msgs, r = schema_messages(home)
    assert msgs == [f"entry {seq}: event 'rejected': [item] expected an item id (16 to 64 lowercase hex digits "
                    f"of a keyed content MAC), got 'snd_0930.wav'"]
    assert r.rejections == {}  # not accounted


def test_authentic_entry_with_an_unknown_kind_is_a_schema_problem(home, keys, ledger):
    seq = add_raw(home, keys, "featurised", {"item": IT, "kind": "video", "rows": 1})
    msgs, _ = schema_messages(home)
    assert len(msgs) == 1 and msgs[0].startswith(f"entry {seq}: event 'featurised': [kind] expected one of")


def test_authentic_entry_with_free_text_reason_is_a_schema_problem(home, keys, ledger):
    seq = add_raw(home, keys, "agent_stop", {"reason": "killed by /usr/bin/x"})
    msgs, _ = schema_messages(home)
    assert msgs == [f"entry {seq}: event 'agent_stop': [reason] expected a short code (lowercase letters, digits, "
                    f"underscore; at most 64), got 'killed by /usr/bin/x'"]


def test_authentic_entry_with_a_string_count_is_a_schema_problem(home, keys, ledger):
    seq = add_raw(home, keys, "repaired", {"dropped_bytes": "12"})
    msgs, _ = schema_messages(home)
    assert msgs == [f"entry {seq}: event 'repaired': [dropped_bytes] expected a non-negative integer, got '12'"]


def test_authentic_entry_missing_a_field_is_a_schema_problem(home, keys, ledger):
    seq = add_raw(home, keys, "alarm", {"check": "damaged_line"})
    msgs, _ = schema_messages(home)
    assert len(msgs) == 1 and msgs[0].startswith(f"entry {seq}: event 'alarm': [lines] required field is missing")


def test_authentic_entry_with_an_extra_field_is_a_schema_problem(home, keys, ledger):
    seq = add_raw(home, keys, "resumed", {"path": "/home/ana/inbox"})
    msgs, _ = schema_messages(home)
    assert msgs == [f"entry {seq}: event 'resumed' has no field 'path' (allowed: none)"]


def test_authentic_entry_of_an_unknown_event_is_a_schema_problem(home, keys, ledger):
    seq = add_raw(home, keys, "deleted", {})
    msgs, _ = schema_messages(home)
    assert len(msgs) == 1 and msgs[0].startswith(f"entry {seq}: unknown event 'deleted'")


def test_entry_of_an_unknown_version_is_not_an_entry(home, keys, ledger):
    last = json.loads(home.ledger_path.read_bytes().splitlines()[-1])
    line = json.loads(sign_line(keys.device_key(), {"seq": 1, "prev": last["hash"], "t": T0 + 5,
                                                    "event": "resumed"}))
    line["v"] = 3
    with open(home.ledger_path, "ab") as f:
        f.write(json.dumps(line).encode() + b"\n")
    r = verify_ledger(home, retention_limit_s=60, now=T0 + 100)
    assert "line 2: entry version 3 is not supported (this lethe reads versions 1 and 2)" in r.messages("schema")
    assert r.damaged_lines == 1 and r.size == 1  # not a leaf of the Merkle log


def test_version_true_is_not_version_1(home, keys, ledger):
    last = json.loads(home.ledger_path.read_bytes().splitlines()[-1])
    line = json.loads(sign_line(keys.device_key(), {"seq": 1, "prev": last["hash"], "t": T0 + 5,
                                                    "event": "resumed"}, version=1))
    line["v"] = True
    with open(home.ledger_path, "ab") as f:
        f.write(json.dumps(line).encode() + b"\n")
    r = verify_ledger(home, retention_limit_s=60, now=T0 + 100)
    assert "line 2: entry version True is not supported (this lethe reads versions 1 and 2)" in r.messages("schema")


def test_version_going_down_is_a_problem(home, keys, ledger):
    seq = add_raw(home, keys, "resumed", {}, version=1)
    msgs, _ = schema_messages(home)
    assert msgs == [f"entry {seq}: version 1 after a version-2 entry (versions never go down)"]


def test_an_unknown_version_is_refused_before_anything_else_is_read():
    from agent.ledger.events import shape_problem

    # a future entry may look nothing like this one: only its version is read
    assert shape_problem({"v": 7}) == "entry version 7 is not supported (this lethe reads versions 1 and 2)"


# -- version 2 entries hash RFC 8785 ------------------------------------------------------

def test_v2_hash_is_sha256_of_rfc8785(home, ledger):
    e = ledger.append("destroyed", item=IT, kind="audio", complete_at=T0, exposure_s=2.0)
    body = {k: v for k, v in e.items() if k not in ("hash", "sig")}
    assert e["v"] == 2 and e["hash"] == hashlib.sha256(rfc8785.dumps(body)).hexdigest()
    # an integral float is written 2 in RFC 8785 (ECMAScript number form) and 2.0 by sorted-key JSON:
    # the two versions hash this entry differently
    legacy = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()
    assert legacy != rfc8785.dumps(body)


def test_v2_anchor_signs_rfc8785(home, keys, ledger):
    anchor = json.loads(home.ledger_head_path.read_text())
    assert anchor["v"] == 2
    keys.device_public().verify(bytes.fromhex(anchor["sig"]),
                                rfc8785.dumps({"v": 2, "seq": anchor["seq"], "hash": anchor["hash"]}))


def test_v2_entry_with_an_integer_beyond_rfc8785_has_no_signed_form(home, keys, ledger):
    # hand-made with a version-1 hash but labelled version 2: RFC 8785 refuses 2**60, so the hash
    # cannot be checked and the entry is not trusted
    last = json.loads(home.ledger_path.read_bytes().splitlines()[-1])
    body = {"v": 2, "seq": 1, "prev": last["hash"], "t": T0 + 5, "event": "repaired", "dropped_bytes": 2 ** 60}
    h = hashlib.sha256(json.dumps(body, sort_keys=True, separators=(",", ":")).encode()).hexdigest()
    entry = {**body, "hash": h, "sig": keys.device_key().sign(bytes.fromhex(h)).hex()}
    with open(home.ledger_path, "ab") as f:
        f.write(json.dumps(entry).encode() + b"\n")
    r = verify_ledger(home, retention_limit_s=60, now=T0 + 100)
    assert any(m.startswith("entry 1: its content has no signed form") for m in r.messages("hash"))


# -- version 1: the frozen fixture ---------------------------------------------------------

def v1_copy(tmp_path) -> Path:
    d = tmp_path / "v1"
    d.mkdir()
    for name in ("ledger.jsonl", "ledger.head"):
        shutil.copyfile(V1 / name, d / name)
    return d


def test_v1_fixture_is_version_1():
    assert {json.loads(x)["v"] for x in (V1 / "ledger.jsonl").read_bytes().splitlines()} == {1}


def test_v1_fixture_verifies(tmp_path):
    d = v1_copy(tmp_path)
    r = verify_ledger(d / "ledger.jsonl", public_key=(V1 / "device.pub").read_text(), retention_limit_s=30,
                      now=T0 + 100)
    assert r.ok, r.problems
    assert r.entries == 6 and r.counts["destroyed"] == 1 and r.exposure["n"] == 1


def test_v1_fixture_tampered_entry_is_caught(tmp_path):
    d = v1_copy(tmp_path)
    ls = (d / "ledger.jsonl").read_bytes().splitlines(keepends=True)
    e = json.loads(ls[4])
    assert e["event"] == "destroyed"
    e["exposure_s"] = 0.5  # a late destruction made to look quick
    ls[4] = json.dumps(e, separators=(",", ":")).encode() + b"\n"
    (d / "ledger.jsonl").write_bytes(b"".join(ls))
    r = verify_ledger(d / "ledger.jsonl", public_key=(V1 / "device.pub").read_text(), retention_limit_s=30,
                      now=T0 + 100)
    assert r.messages() == ["entry 4: content does not match its hash"]


def test_v1_fixture_rehashed_as_v2_is_caught(tmp_path):
    # relabelling an old entry as version 2 changes its signed form, so its hash no longer matches
    d = v1_copy(tmp_path)
    ls = (d / "ledger.jsonl").read_bytes().splitlines(keepends=True)
    e = json.loads(ls[4])
    e["v"] = 2
    ls[4] = json.dumps(e, separators=(",", ":")).encode() + b"\n"
    (d / "ledger.jsonl").write_bytes(b"".join(ls))
    r = verify_ledger(d / "ledger.jsonl", public_key=(V1 / "device.pub").read_text(), retention_limit_s=30,
                      now=T0 + 100)
    assert "entry 4: content does not match its hash" in r.messages("hash")


def test_v1_ledger_continues_in_v2_and_verifies(tmp_path):
    d = v1_copy(tmp_path)
    lg = Ledger(d / "ledger.jsonl", V1_KEY, clock=lambda: T0 + 50)
    e = lg.append("agent_start", version="0.2.0")
    assert e["v"] == 2 and e["seq"] == 6
    assert json.loads((d / "ledger.head").read_text())["v"] == 2
    r = verify_ledger(d / "ledger.jsonl", public_key=(V1 / "device.pub").read_text(), retention_limit_s=30,
                      now=T0 + 100)
    assert r.ok, r.problems
    assert r.entries == 7


def test_v1_anchor_still_verifies(tmp_path):
    d = v1_copy(tmp_path)
    assert json.loads((d / "ledger.head").read_text())["v"] == 1
    r = verify_ledger(d / "ledger.jsonl", public_key=(V1 / "device.pub").read_text(), retention_limit_s=30,
                      now=T0 + 100)
    assert r.anchor == {"seq": 5, "hash": json.loads((d / "ledger.head").read_text())["hash"]}
    assert r.messages("anchor") == []


def test_v1_anchor_with_forged_signature_is_caught(tmp_path):
    d = v1_copy(tmp_path)
    a = json.loads((d / "ledger.head").read_text())
    a["sig"] = Ed25519PrivateKey.generate().sign(b"x").hex()
    (d / "ledger.head").write_text(json.dumps(a))
    r = verify_ledger(d / "ledger.jsonl", public_key=(V1 / "device.pub").read_text(), retention_limit_s=30,
                      now=T0 + 100)
    assert any("the anchor's signature does not verify" in m for m in r.messages("anchor"))


def test_contract_name_is_listed():
    assert "ledger-entry" in contracts.SCHEMA_NAMES


def test_docs_tables_in_step_with_the_contract():
    from agent.ledger import schema_doc

    doc = Path(__file__).resolve().parent.parent / "docs" / "ledger.md"
    text = doc.read_text("utf-8")
    assert schema_doc.splice(text) == text, (
        "docs/ledger.md is stale; run: python -m agent.ledger.schema_doc --write docs/ledger.md")


def test_docs_list_every_event():
    text = (Path(__file__).resolve().parent.parent / "docs" / "ledger.md").read_text("utf-8")
    for event in LEDGER_EVENTS:
        assert f"| `{event}` |" in text


def test_every_append_method_checks_the_contract(home, ledger):
    # Whatever group-append API the writer offers (append, append_many, ...), an event that does not
    # meet the contract is refused before anything is written.
    before = home.ledger_path.read_bytes()
    names = [n for n in dir(Ledger) if n.startswith("append") and callable(getattr(Ledger, n))]
    assert {"append", "append_many"} <= set(names)
    for name in names:
        method = getattr(ledger, name)
        with pytest.raises(EventError, match="unknown event 'bogus'"):
            method("bogus") if name == "append" else method([("bogus", {})])
    assert home.ledger_path.read_bytes() == before


def test_v1_checkpoint_is_still_read_and_verified(home, keys, ledger):
    # a checkpoint signed in version 1's form (sorted-key JSON) by the device key
    from agent.ledger.log import LogState

    ledger.append("agent_stop")
    state = Ledger(home).state().to_dict()
    body = json.dumps({"v": 1, "state": state}, sort_keys=True, separators=(",", ":"),
                      ensure_ascii=False).encode()
    doc = {"v": 1, "state": state, "sig": keys.device_key().sign(body).hex()}
    (home.root / "ledger.checkpoint").write_text(json.dumps(doc))
    r = verify_ledger(home, retention_limit_s=60, now=T0 + 100)
    assert r.ok, r.problems
    assert r.messages("checkpoint") == []
    assert LogState.from_dict(state).seq == 1


def test_checkpoint_of_an_unknown_version_is_a_problem(home, keys, ledger):
    state = Ledger(home).state().to_dict()
    (home.root / "ledger.checkpoint").write_text(json.dumps({"v": 9, "state": state, "sig": "00" * 64}))
    r = verify_ledger(home, retention_limit_s=60, now=T0 + 100)
    assert r.messages("checkpoint") == ["ledger.checkpoint: checkpoint version 9 is not supported (this lethe "
                                        "reads 1 and 2)"]


def test_v2_checkpoint_is_written_and_signs_rfc8785(home, keys):
    from agent.ledger import CHECKPOINT_EVERY

    lg = Ledger(home, keys.device_key(), clock=Clock())
    lg.append_many([("agent_start", {})] * CHECKPOINT_EVERY)
    doc = json.loads((home.root / "ledger.checkpoint").read_text())
    assert doc["v"] == 2
    keys.device_public().verify(bytes.fromhex(doc["sig"]), rfc8785.dumps({"v": 2, "state": doc["state"]}))
