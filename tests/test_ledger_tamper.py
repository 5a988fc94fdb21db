"""Tamper evidence: each way of altering the ledger is its own test and must be
named by verify_ledger with its own message (which entry, which check)."""

from __future__ import annotations

import json
import shutil

import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from stepping_clock import T0
from stepping_clock import SteppingClock as Clock

from agent.keystore import Keystore, device_key_id
from agent.ledger import Ledger, entry_hash, verify_ledger

N_ITEMS = 4  # 1 agent_start + 3 entries per item = 13 entries, seq 0..12


@pytest.fixture
def built(home):
    ks = Keystore(home).ensure()
    lg = Ledger(home, ks.device_key(), clock=Clock())
    lg.append("agent_start", version="0.1.0")
    for i in range(N_ITEMS):
        it = f"{i:032x}"
        lg.append("received", item=it, kind="audio", bytes=1000 + i, complete_at=T0)
        lg.append("featurised", item=it, kind="audio", rows=1)
        lg.append("destroyed", item=it, kind="audio", complete_at=T0, exposure_s=1.0)
    return home, lg


def lines(home):
    return home.ledger_path.read_bytes().splitlines(keepends=True)


def write(home, ls):
    home.ledger_path.write_bytes(b"".join(ls))


def check(home, **kw):
    return verify_ledger(home, retention_limit_s=60, now=T0 + 100, **kw)


def only_problem(report):
    assert not report.ok
    assert len(report.problems) == 1, report.problems
    return report.problems[0]


def test_untouched_ledger_verifies(built):
    home, _ = built
    r = check(home)
    assert r.ok, r.problems
    assert r.entries == 13 and r.head["seq"] == 12


def test_deleted_middle_entry(built):
    home, _ = built
    ls = lines(home)
    del ls[5]
    write(home, ls)
    p = only_problem(check(home))
    assert (p["check"], p["seq"], p["message"]) == ("seq", 5, "entry 5 missing")


def test_deleted_run_of_entries(built):
    home, _ = built
    ls = lines(home)
    del ls[4:7]
    write(home, ls)
    p = only_problem(check(home))
    assert p["message"] == "entries 4 to 6 missing"


def test_deleted_last_entry(built):
    home, _ = built
    write(home, lines(home)[:-1])
    p = only_problem(check(home))
    assert p["check"] == "anchor"
    assert p["message"] == ("the ledger ends at entry 11 but its anchor records entry 12: rolled back to an "
                            "older copy, or the last 1 entry removed")


def test_edited_field(built):
    home, _ = built
    ls = lines(home)
    e = json.loads(ls[4])
    assert e["event"] == "received"
    e["bytes"] = 1
    ls[4] = (json.dumps(e) + "\n").encode()
    write(home, ls)
    p = only_problem(check(home))
    assert (p["check"], p["message"]) == ("hash", "entry 4: content does not match its hash")


def test_edited_timestamp_to_hide_late_destruction(built):
    home, _ = built
    ls = lines(home)
    e = json.loads(ls[3])
    assert e["event"] == "destroyed"
    e["exposure_s"] = 0.1
    ls[3] = (json.dumps(e) + "\n").encode()
    write(home, ls)
    assert check(home).messages() == ["entry 3: content does not match its hash"]


def test_edited_event_name(built):
    home, _ = built
    ls = lines(home)
    e = json.loads(ls[3])
    e["event"] = "rejected"  # a destruction turned into a rejection
    ls[3] = (json.dumps(e) + "\n").encode()
    write(home, ls)
    msgs = check(home).messages()
    # The content of an entry whose hash does not match is not trusted, so it is not checked
    # against the contract either: the hash is the one finding.
    assert msgs == ["entry 3: content does not match its hash"]


def test_edited_entry_with_recomputed_hash(built):
    # Someone without the device key edits an entry and fixes up its hash.
    home, _ = built
    ls = lines(home)
    e = json.loads(ls[5])
    assert e["event"] == "featurised"
    e["rows"] = 99
    e["hash"] = entry_hash(e)
    ls[5] = (json.dumps(e) + "\n").encode()
    write(home, ls)
    kid = device_key_id(Keystore(home).device_public())
    assert check(home).messages() == ["entry 6: its previous-hash link does not match entry 5",
                                      f"entry 5: signature does not verify with device key {kid}"]


def test_reordered_entries(built):
    home, _ = built
    ls = lines(home)
    ls[6], ls[7] = ls[7], ls[6]
    write(home, ls)
    p = only_problem(check(home))
    assert (p["check"], p["seq"], p["message"]) == ("order", 6, "entry 6 is out of order: found after entry 7")


def test_duplicated_entry(built):
    home, _ = built
    ls = lines(home)
    ls.insert(5, ls[4])
    write(home, ls)
    p = only_problem(check(home))
    assert p["message"] == "entry 4 appears more than once (again at line 6)"


def test_truncated_file(built):
    home, _ = built
    data = home.ledger_path.read_bytes()
    home.ledger_path.write_bytes(data[:-40])  # cut inside the last line
    msgs = check(home).messages()
    assert msgs[0].startswith("the last line is incomplete (")
    assert "bytes after entry 11): a write was torn by a crash or the file was truncated" in msgs[0]
    # the anchor still remembers entry 12
    assert msgs[1].startswith("the ledger ends at entry 11 but its anchor records entry 12")


def test_not_json_line(built):
    home, _ = built
    ls = lines(home)
    ls[2] = b"{this is not json\n"
    write(home, ls)
    msgs = check(home).messages()
    assert msgs[0] == "line 3: not valid JSON"
    assert "entry 2 missing" in msgs


def test_replaced_by_older_copy(built, tmp_path):
    home, lg = built
    old = tmp_path / "old-ledger.jsonl"
    shutil.copy(home.ledger_path, old)  # a copy taken at entry 12
    for _ in range(5):
        lg.append("resumed")
    shutil.copy(old, home.ledger_path)  # rolled back; the anchor is current
    p = only_problem(check(home))
    assert p["check"] == "anchor"
    assert p["message"] == ("the ledger ends at entry 12 but its anchor records entry 17: rolled back to an "
                            "older copy, or the last 5 entries removed")


def test_replaced_by_another_ledger_of_the_same_length(built, tmp_path):
    # A rewritten history signed with the device key would need the key; a
    # ledger from elsewhere fails its signatures and mismatches the anchor.
    home, _ = built
    other_home = tmp_path / "other"
    from agent.home import Home

    oh = Home(other_home).create()
    olg = Ledger(oh, Ed25519PrivateKey.generate(), clock=Clock())
    for _ in range(13):
        olg.append("resumed")
    shutil.copy(oh.ledger_path, home.ledger_path)
    msgs = check(home).messages()
    assert any(m.startswith("no entry's signature verifies with device key") for m in msgs)
    assert "entry 12 does not match the anchor: the ledger was replaced or rewritten" in msgs


def test_forged_signature(built):
    home, _ = built
    ls = lines(home)
    e = json.loads(ls[3])
    e["sig"] = Ed25519PrivateKey.generate().sign(bytes.fromhex(e["hash"])).hex()
    ls[3] = (json.dumps(e) + "\n").encode()
    write(home, ls)
    kid = device_key_id(Keystore(home).device_public())
    p = only_problem(check(home))
    assert (p["check"], p["message"]) == ("signature", f"entry 3: signature does not verify with device key {kid}")


def test_wrong_device_key(built):
    home, _ = built
    wrong = Ed25519PrivateKey.generate().public_key()
    kid = device_key_id(wrong)
    r = check(home, public_key=wrong)
    assert r.messages() == [
        f"no entry's signature verifies with device key {kid}: the wrong public key was given, "
        f"or the whole ledger was re-signed by another key",
        f"ledger.head: the anchor's signature does not verify with device key {kid}",
    ]


def test_missing_anchor(built):
    home, _ = built
    home.ledger_head_path.unlink()
    p = only_problem(check(home))
    assert (p["check"], p["message"]) == (
        "anchor", "ledger.head is missing: a rollback to an older copy of the ledger cannot be ruled out")


def test_forged_anchor(built):
    home, _ = built
    doc = json.loads(home.ledger_head_path.read_text())
    doc["seq"] = 3
    doc["hash"] = json.loads(lines(home)[3])["hash"]  # pretend the ledger was shorter
    home.ledger_head_path.write_text(json.dumps(doc))
    kid = device_key_id(Keystore(home).device_public())
    p = only_problem(check(home))
    assert p["message"] == f"ledger.head: the anchor's signature does not verify with device key {kid}"


def test_damaged_anchor(built):
    home, _ = built
    home.ledger_head_path.write_text("{")
    p = only_problem(check(home))
    assert p["message"] == "ledger.head: the anchor is damaged (not a signed {seq, hash} document)"


def test_missing_public_key(built):
    home, _ = built
    (home.keys / "device.pub").unlink()
    p = only_problem(check(home))
    assert p["check"] == "key"
    assert "signatures cannot be checked" in p["message"]


def test_many_failures_are_summarised(built):
    home, lg = built
    for _ in range(30):
        lg.append("resumed")
    ls = lines(home)
    for k in range(1, len(ls)):
        e = json.loads(ls[k])
        e["t"] += 1
        ls[k] = (json.dumps(e) + "\n").encode()
    write(home, ls)
    msgs = check(home).messages("hash")
    assert len(msgs) == 21
    assert msgs[-1] == "... and 22 more hash problem(s)"


# -- the agent keeps running after tampering, without erasing the evidence ---------

def test_deleted_ledger_then_agent_continues(built):
    home, _ = built
    home.ledger_path.unlink()
    Ledger(home, Keystore(home).device_key()).append("agent_start")  # a restarted agent
    r = check(home)
    assert r.messages() == ["entries 0 to 12 missing"]
    assert r.head["seq"] == 13


def test_rollback_then_agent_continues(built, tmp_path):
    home, lg = built
    old = tmp_path / "old.jsonl"
    shutil.copy(home.ledger_path, old)
    for _ in range(3):
        lg.append("resumed")
    shutil.copy(old, home.ledger_path)
    Ledger(home, Keystore(home).device_key()).append("agent_start")
    assert check(home).messages() == ["entries 13 to 15 missing"]


# -- property: any change of meaning is detected ---------------------------------

from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

_EDIT_BYTES = st.sampled_from(b"0123456789abcdef\"{}[]:,.-eEtrunlsx ")


@st.composite
def tampering(draw):
    op = draw(st.sampled_from(["delete", "swap", "edit", "duplicate", "truncate", "prefix"]))
    return op, draw(st.integers(0, 10 ** 6)), draw(st.integers(0, 10 ** 6)), draw(_EDIT_BYTES)


def _apply(data: bytes, op, a, b, byte) -> bytes:
    ls = data.splitlines(keepends=True)
    n = len(ls)
    if op == "delete":
        del ls[a % n]
    elif op == "swap":
        i, j = a % n, b % n
        if i == j:
            j = (i + 1) % n
        ls[i], ls[j] = ls[j], ls[i]
    elif op == "duplicate":
        i = a % n
        ls.insert(b % (n + 1), ls[i])
    elif op == "edit":
        line = bytearray(ls[a % n])
        k = b % (len(line) - 1)  # never the newline
        line[k] = byte if line[k] != byte else (byte + 1) % 128 or 49
        ls[a % n] = bytes(line)
    elif op == "truncate":
        return data[: a % len(data)]
    elif op == "prefix":
        return b"".join(ls[: a % n])
    return b"".join(ls)


def _meaning(data: bytes):
    out = []
    for line in data.splitlines():
        try:
            out.append(json.loads(line))
        except ValueError:
            out.append(None)
    return out


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(t=tampering())
def test_any_change_of_meaning_is_detected(built, t):
    home, _ = built
    if not hasattr(home, "_pristine"):
        home._pristine = home.ledger_path.read_bytes()
    original = home._pristine
    changed = _apply(original, *t)
    home.ledger_path.write_bytes(changed)
    r = check(home)
    # A byte edit may yield the same JSON value (say 1790000000.0 -> 1790000000e0):
    # that changes nothing and may verify; every other change must not.
    assert (not r.ok) or _meaning(changed) == _meaning(original), (t, r.problems)
    home.ledger_path.write_bytes(original)
