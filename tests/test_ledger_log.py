"""The ledger as a Merkle log (issue 12, finding 3): no new ledger over a home with data,
the log section each bundle carries, continuity between bundles, checkpoints of the
running counts (issue 15).  Merkle hashing itself is checked in test_merkle.py
against RFC 9162 and pymerkle."""

from __future__ import annotations

import json
import shutil

import pytest

from agent import merkle
from agent.keystore import Keystore
from agent.ledger import (
    CHECKPOINT_EVERY,
    Ledger,
    LedgerMissingError,
    log_section,
    verify_ledger,
    verify_log_continuity,
)
from agent.ledger.log import CHECKPOINT_NAME, checkpoint_body
from agent.vault import Vault

T0 = 1_790_000_000.0


def item(i):
    return f"{i:032x}"


@pytest.fixture
def keys(home):
    return Keystore(home, use_keyring=False).ensure()


@pytest.fixture
def ledger(home, keys):
    return Ledger(home, keys.device_key(), clock=lambda: T0)


def fill(lg, n, start=0):
    for i in range(start, start + n):
        lg.append_many([("received", dict(item=item(i), kind="audio", bytes=10, complete_at=T0)),
                        ("destroyed", dict(item=item(i), kind="audio", complete_at=T0, exposure_s=0.25))])


def section(home):
    return log_section(verify_ledger(home, retention_limit_s=1e9, now=T0, keep_leaves=True))


# -- finding 3: the device does not quietly start a new ledger -------------------------

def test_wiped_ledger_in_a_home_with_vault_data_is_refused(home, keys, ledger):
    ledger.append("agent_start")
    with Vault.open(home) as v:
        v.put("episodes", "k", {"x": 1})
    home.ledger_path.unlink()
    home.ledger_head_path.unlink()
    with pytest.raises(LedgerMissingError, match="holds vault records; refusing to start a new ledger"):
        Ledger(home, keys.device_key()).append("agent_start")


def test_emptied_ledger_in_an_enrolled_home_is_refused(home, keys, ledger):
    ledger.append("agent_start")
    home.write_config({"pseudonym": "p-x", "log_origin": "ab" * 32})
    home.ledger_path.write_bytes(b"")
    home.ledger_head_path.unlink()
    with pytest.raises(LedgerMissingError, match="an enrolment"):
        Ledger(home, keys.device_key()).append("agent_start")


def test_a_fresh_home_starts_its_ledger(home, keys):
    assert Ledger(home, keys.device_key()).append("agent_start")["seq"] == 0


# -- the Merkle log ------------------------------------------------------------------------

def test_leaves_are_the_stored_lines(home, ledger):
    fill(ledger, 3)
    lines = home.ledger_path.read_bytes().splitlines()
    s = section(home)
    # RFC 9162 section 2.1.1: leaf = HASH(0x00 || entry); the entry is the line as stored.
    assert s["root"] == merkle.root([merkle.leaf_hash(x) for x in lines]).hex()
    assert s["size"] == 6 and s["origin"] == json.loads(lines[0])["hash"]


def test_running_root_matches_the_verifier(home, ledger):
    fill(ledger, 5)
    st = ledger.state()
    assert (st.size, st.root()) == (10, section(home)["root"])


def test_log_section_carries_proofs_from_recorded_exports(home, ledger):
    fill(ledger, 3)
    first = section(home)
    ledger.append("exported", bundle_seq=1, digest="c" * 64, log_size=first["size"])
    fill(ledger, 4, start=3)
    second = section(home)
    assert [p["from_size"] for p in second["proofs"]] == [first["size"]]
    assert second["proofs"][0]["from_root"] == first["root"]
    assert verify_log_continuity(first, second) == []


# -- continuity between bundles (for 'lethe study open') ------------------------------------

def test_continuity_first_bundle_matches_enrolment_origin(home, ledger):
    fill(ledger, 2)
    s = section(home)
    assert verify_log_continuity(None, s, origin=s["origin"]) == []


def test_continuity_flags_a_reset_against_the_enrolment(home, ledger):
    fill(ledger, 2)
    s = section(home)
    (msg,) = verify_log_continuity(None, s, origin="ab" * 32)
    assert msg.startswith("reset: the log starts at entry hash")


def test_continuity_flags_a_new_ledger(tmp_path, home, ledger):
    fill(ledger, 3)
    first = section(home)
    other = tmp_path / "other.jsonl"  # a ledger begun again elsewhere with the same device key
    lg2 = Ledger(other, Keystore(home, use_keyring=False).device_key(), clock=lambda: T0 + 1)
    fill(lg2, 5)
    second = log_section(verify_ledger(other, public_key=Keystore(home).device_public(), retention_limit_s=1e9,
                                       now=T0, keep_leaves=True))
    problems = verify_log_continuity(first, second)
    assert any(p.startswith("reset: the log now starts at") for p in problems)


def test_continuity_flags_a_rollback(home, ledger):
    fill(ledger, 2)
    small = section(home)
    ledger.append("exported", bundle_seq=1, digest="c" * 64, log_size=small["size"])
    fill(ledger, 2, start=2)
    big = section(home)
    problems = verify_log_continuity(big, small)
    assert f"rollback: the log has {small['size']} entries, the previous bundle's had {big['size']}" in problems


def test_continuity_flags_counts_going_down(home, ledger):
    fill(ledger, 2)
    a = section(home)
    ledger.append("exported", bundle_seq=1, digest="c" * 64, log_size=a["size"])
    fill(ledger, 1, start=2)
    b = section(home)
    b["counts"]["destroyed"] = 1
    assert "counts go down: 'destroyed' was 2, now 1" in verify_log_continuity(a, b)


def test_continuity_flags_a_rewritten_prefix(home, ledger, tmp_path):
    fill(ledger, 2)
    a = section(home)
    ledger.append("exported", bundle_seq=1, digest="c" * 64, log_size=a["size"])
    fill(ledger, 2, start=2)
    b = section(home)
    a2 = dict(a, root="00" * 32)  # what the study saw before differs from what the device proves now
    problems = verify_log_continuity(a2, b)
    assert problems == [f"rewrite: the first {a['size']} entries now have a different root than in the "
                        f"previous bundle"]


def test_continuity_flags_a_forged_proof(home, ledger):
    fill(ledger, 3)
    a = section(home)
    ledger.append("exported", bundle_seq=1, digest="c" * 64, log_size=a["size"])
    fill(ledger, 3, start=3)
    b = section(home)
    b["proofs"][0]["proof"][0] = "11" * 32
    (msg,) = verify_log_continuity(a, b)
    assert msg.startswith(f"rewrite: the consistency proof from {a['size']} to {b['size']} entries does not hold")


def test_continuity_without_a_log_section():
    assert verify_log_continuity(None, None) == [
        "the bundle carries no log section: its ledger's continuity cannot be checked"]


# -- checkpoints of the running counts (issue 15) ------------------------------------------

def test_checkpoint_written_and_matches_a_full_read(home, ledger, keys):
    fill(ledger, CHECKPOINT_EVERY // 2 + 10)
    cp = home.root / CHECKPOINT_NAME
    assert cp.exists()
    fill(ledger, 3, start=10_000)
    from_cp = Ledger(home).state()  # reads the checkpoint, then the entries after it
    cp.unlink()
    full = Ledger(home).state()
    assert from_cp.to_dict() == full.to_dict()
    assert full.counts == {"received": CHECKPOINT_EVERY // 2 + 13, "destroyed": CHECKPOINT_EVERY // 2 + 13}
    assert full.open == {}


def test_open_items_from_the_running_state(home, ledger):
    fill(ledger, 2)
    ledger.append("received", item=item(99), kind="gps", bytes=5, complete_at=T0)
    assert Ledger(home).open_items() == {item(99): {"kind": "gps", "complete_at": T0, "seq": 4}}


def test_verifier_checks_the_checkpoint(home, ledger, keys):
    fill(ledger, CHECKPOINT_EVERY // 2 + 1)
    assert verify_ledger(home, retention_limit_s=1e9, now=T0).ok
    cp = home.root / CHECKPOINT_NAME
    doc = json.loads(cp.read_text())
    doc["state"]["counts"]["destroyed"] -= 5  # a checkpoint that disagrees with the entries before it
    doc["sig"] = keys.device_key().sign(checkpoint_body(doc["state"])).hex()
    cp.write_text(json.dumps(doc))
    r = verify_ledger(home, retention_limit_s=1e9, now=T0)
    assert r.messages("checkpoint") == [
        f"entry {doc['state']['seq']}: the signed checkpoint does not match the ledger up to it "
        f"(counts differ): entries before it were changed"]


def test_verifier_flags_a_checkpoint_beyond_a_cut_ledger(home, ledger, tmp_path):
    fill(ledger, 3)
    old = tmp_path / "old"
    shutil.copy(home.ledger_path, old)
    fill(ledger, CHECKPOINT_EVERY // 2, start=3)
    shutil.copy(old, home.ledger_path)
    r = verify_ledger(home, retention_limit_s=1e9, now=T0)
    msgs = r.messages("checkpoint")
    assert any(m.startswith(f"{CHECKPOINT_NAME}: the signed checkpoint records entry") for m in msgs)


def test_parallel_signature_check_finds_a_bad_signature(home, ledger, monkeypatch):
    from agent.ledger import verify as ledger_verify

    monkeypatch.setattr(ledger_verify, "SIG_CHUNK", 8)
    monkeypatch.setattr(ledger_verify, "PARALLEL_FROM", 8)
    fill(ledger, 20)
    lines = home.ledger_path.read_bytes().splitlines(keepends=True)
    e = json.loads(lines[30])
    e["sig"] = ("0" if e["sig"][0] != "0" else "1") + e["sig"][1:]
    lines[30] = json.dumps(e, separators=(",", ":")).encode() + b"\n"
    home.ledger_path.write_bytes(b"".join(lines))
    r = verify_ledger(home, retention_limit_s=1e9, now=T0, workers=2)
    assert r.messages("signature") == [f"entry 30: signature does not verify with device key {r.device_key_id}"]


# -- end to end: enrolment origin and 'lethe study open' ------------------------------------

def test_study_open_refuses_a_bundle_from_a_restarted_ledger(tmp_path):
    from _bundle_fixtures import PASS
    from test_bundle_export import make_world

    from agent.export import export_bundle
    from agent.errors import IntegrityError
    from agent.home import Home
    from agent.study.open import open_bundles

    home, study = make_world(tmp_path)
    first = export_bundle(home, now=T0)
    assert open_bundles(study, [first], PASS)[0].ok
    # The attacker of finding 3: a fresh ledger signed with the device key replaces the old one.
    fresh = Home(tmp_path / "elsewhere").create()
    Ledger(fresh, Keystore(home).device_key()).append("policy", fingerprint=home.load_policy().fingerprint)
    shutil.copy(fresh.ledger_path, home.ledger_path)
    shutil.copy(fresh.ledger_head_path, home.ledger_head_path)
    second = export_bundle(home, now=T0)
    with pytest.raises(IntegrityError, match="does not continue the one seen before: reset"):
        open_bundles(study, [second], PASS)


def test_study_open_accepts_a_continued_ledger(tmp_path):
    from _bundle_fixtures import PASS
    from test_bundle_export import make_world

    from agent.export import export_bundle
    from agent.study.open import open_bundles

    home, study = make_world(tmp_path)
    res = open_bundles(study, [export_bundle(home, now=T0), export_bundle(home, now=T0)], PASS)
    assert [r.ok for r in res] == [True, True]


def test_opening_reads_only_after_the_checkpoint(home, ledger):
    # Issue 15: start-up and status read the checkpoint and the entries after it, not the
    # whole ledger.  Shown by damage placed before the checkpoint, which only a full read sees.
    fill(ledger, CHECKPOINT_EVERY // 2 + 10)
    data = bytearray(home.ledger_path.read_bytes())
    data[5:9] = b"XXXX"  # inside line 1, long before the checkpoint
    home.ledger_path.write_bytes(bytes(data))
    assert Ledger(home).state().damaged == 0       # from the checkpoint on
    (home.root / CHECKPOINT_NAME).unlink()
    assert Ledger(home).state().damaged == 1       # the whole file
    assert not verify_ledger(home, retention_limit_s=1e9, now=T0).ok  # the verifier always reads everything


def test_taken_counts_from_the_running_state(home, ledger):
    # For intake (issue 12, finding 10): items taken in again and again without an outcome.
    ledger.append("received", item=item(1), kind="audio", bytes=1, complete_at=T0)
    ledger.append("received", item=item(1), kind="audio", bytes=1, complete_at=T0)
    ledger.append("received", item=item(2), kind="audio", bytes=1, complete_at=T0)
    ledger.append("rejected", item=item(2), kind="audio", reason="bad_header")
    assert Ledger(home).taken_counts() == {item(1): 2}
