"""The ledger: entry layout, validation, durability under concurrency and torn
writes, the rollback anchor, and the retention accounting checked against an
independent computation from the test's own timestamps."""

from __future__ import annotations

import hashlib
import json
import multiprocessing
import os
import stat
import threading

import numpy as np
import pytest
import rfc8785
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from agent.errors import StateError
from agent.keystore import Keystore
from agent.ledger import LEDGER_EVENTS, ZERO_HASH, Ledger, digest, verify_ledger

T0 = 1_790_000_000.0  # a fixed Unix time, so every timestamp below is known


class Clock:
    def __init__(self, t=T0):
        self.t = t

    def __call__(self):
        return self.t


def item(i):
    return f"{i:032x}"


@pytest.fixture
def keys(home):
    return Keystore(home).ensure()


@pytest.fixture
def clock():
    return Clock()


@pytest.fixture
def ledger(home, keys, clock):
    return Ledger(home, keys.device_key(), clock=clock)


def lifecycle(lg, clock, i, *, kind="audio", complete_at, destroyed_at, exposure_s=None):
    clock.t = complete_at + 0.01
    lg.append_many([("received", dict(item=item(i), kind=kind, bytes=96044, complete_at=complete_at)),
                    ("featurised", dict(item=item(i), kind=kind, rows=1))])
    clock.t = destroyed_at
    recorded = destroyed_at - complete_at if exposure_s is None else exposure_s
    lg.append("destroyed", item=item(i), kind=kind, complete_at=complete_at, exposure_s=recorded)


def canonical(obj):
    # Entry version 2 hashes the JSON Canonicalization Scheme (RFC 8785); the reference here is the
    # rfc8785 package itself, not lethe's wrapper of it.
    return rfc8785.dumps(obj)


# -- layout -----------------------------------------------------------------------

def test_first_entry_layout(ledger, keys, clock):
    e = ledger.append("agent_start", version="0.1.0")
    assert list(e)[:5] == ["v", "seq", "prev", "t", "event"]
    assert e["v"] == 2 and e["seq"] == 0 and e["prev"] == ZERO_HASH and e["t"] == T0
    body = {k: v for k, v in e.items() if k not in ("hash", "sig")}
    assert e["hash"] == hashlib.sha256(canonical(body)).hexdigest()
    keys.device_public().verify(bytes.fromhex(e["sig"]), bytes.fromhex(e["hash"]))


def test_entries_chain(ledger):
    a = ledger.append("agent_start")
    b = ledger.append("paused", until=T0 + 3600)
    c = ledger.append("resumed")
    assert (b["seq"], b["prev"]) == (1, a["hash"])
    assert (c["seq"], c["prev"]) == (2, b["hash"])
    assert [e["seq"] for e in ledger.entries()] == [0, 1, 2]


def test_line_on_disk_is_the_entry(home, ledger):
    e = ledger.append("policy", fingerprint="ab" * 32)
    assert json.loads(home.ledger_path.read_text()) == e


def test_head_and_anchor(home, ledger, keys):
    assert ledger.head() == {"seq": -1, "hash": ZERO_HASH}
    ledger.append("agent_start")
    e = ledger.append("agent_stop", reason="signal")
    assert ledger.head() == {"seq": 1, "hash": e["hash"]}
    anchor = json.loads(home.ledger_head_path.read_text())
    assert (anchor["seq"], anchor["hash"]) == (1, e["hash"])
    keys.device_public().verify(bytes.fromhex(anchor["sig"]),
                                canonical({"v": 2, "seq": 1, "hash": e["hash"]}))


def test_files_are_private(home, ledger):
    ledger.append("agent_start")
    for p in (home.ledger_path, home.ledger_head_path):
        assert stat.S_IMODE(os.stat(p).st_mode) == 0o600


def test_events_listed():
    assert set(LEDGER_EVENTS) >= {"agent_start", "agent_stop", "policy", "received", "featurised", "rejected",
                                  "destroyed", "paused", "resumed", "coded", "exported", "withdrawn", "repaired"}


def test_numpy_numbers_are_accepted(ledger):
    e = ledger.append("received", item=item(1), kind="gps", bytes=np.int64(10), complete_at=np.float64(T0))
    assert type(e["bytes"]) is int and type(e["complete_at"]) is float


# -- validation ---------------------------------------------------------------------

def test_unknown_event(ledger):
    with pytest.raises(ValueError, match="unknown event 'deleted'"):
        ledger.append("deleted")


def test_unknown_field(ledger):
    with pytest.raises(ValueError, match="event 'resumed' has no field 'path'"):
        ledger.append("resumed", path="/home/x/snd.wav")


def test_missing_field(ledger):
    with pytest.raises(ValueError, match=r"event 'received': \[complete_at\] required field is missing"):
        ledger.append("received", item=item(1), kind="audio", bytes=1)


def test_wrong_field_type(ledger):
    with pytest.raises(ValueError, match=r"\[bytes\] expected a non-negative integer, got '12'"):
        ledger.append("received", item=item(1), kind="audio", bytes="12", complete_at=T0)


def test_file_name_cannot_pose_as_item(ledger):
    with pytest.raises(ValueError, match=r"\[item\] expected an item id"):
        ledger.append("rejected", item="snd_20261103T142000Z.wav", kind="audio", reason="truncated")


def test_free_text_reason_refused(ledger):
    with pytest.raises(ValueError, match=r"\[reason\] expected a short code"):
        ledger.append("rejected", item=item(1), kind="audio", reason="could not read /home/ana/x.wav")


def test_reserved_field_refused(ledger):
    with pytest.raises(ValueError, match="field 'seq' is set by the ledger itself"):
        ledger.append("exported", seq=3, bundle_seq=3, digest="0" * 64)


def test_unknown_kind(ledger):
    with pytest.raises(ValueError, match=r"\[kind\] expected one of 'audio', 'gps', 'accel', 'mood', 'unknown'"):
        ledger.append("featurised", item=item(1), kind="video", rows=1)


def test_nan_refused(ledger):
    with pytest.raises(ValueError, match="a finite number"):
        ledger.append("destroyed", item=item(1), kind="audio", complete_at=T0, exposure_s=float("nan"))


def test_invalid_batch_writes_nothing(home, ledger):
    with pytest.raises(ValueError):
        ledger.append_many([("agent_start", {}), ("bogus", {})])
    assert not home.ledger_path.exists() or home.ledger_path.read_bytes() == b""


def test_read_only_ledger_refuses_append(home):
    with pytest.raises(StateError, match="read-only"):
        Ledger(home).append("agent_start")


# -- concurrency and durability -------------------------------------------------------

def test_concurrent_appends_from_threads(home, keys):
    lg = Ledger(home, keys.device_key())

    def work():
        for _ in range(25):
            lg.append("resumed")

    threads = [threading.Thread(target=work) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    r = verify_ledger(home, retention_limit_s=30)
    assert r.ok, r.problems
    assert r.entries == 100 and r.head["seq"] == 99


def test_two_ledger_objects_on_one_file(home, keys):
    a = Ledger(home, keys.device_key())
    b = Ledger(home, keys.device_key())
    for _ in range(5):
        a.append("paused", until=None)
        b.append("resumed")
    r = verify_ledger(home, retention_limit_s=30)
    assert r.ok, r.problems
    assert r.entries == 10


def _child_appends(root, n):
    from agent.home import Home

    home = Home(root)
    lg = Ledger(home, Keystore(home).device_key())
    for _ in range(n):
        lg.append("resumed")


def test_concurrent_appends_from_processes(home, keys):
    ctx = multiprocessing.get_context("fork")
    procs = [ctx.Process(target=_child_appends, args=(str(home.root), 25)) for _ in range(3)]
    for p in procs:
        p.start()
    _child_appends(str(home.root), 25)
    for p in procs:
        p.join(30)
        assert p.exitcode == 0
    r = verify_ledger(home, retention_limit_s=30)
    assert r.ok, r.problems
    assert r.entries == 100


def test_torn_tail_is_repaired_and_recorded(home, ledger):
    ledger.append("agent_start")
    ledger.append("resumed")
    with open(home.ledger_path, "ab") as f:
        f.write(b'{"v":1,"seq":2,"prev":"ab')  # a crash mid-write
    before = verify_ledger(home, retention_limit_s=30)
    assert [p["check"] for p in before.problems] == ["truncation"]
    fresh = Ledger(home, Keystore(home).device_key())  # the restarted agent
    e = fresh.append("agent_start")
    events = [x["event"] for x in fresh.entries()]
    assert events == ["agent_start", "resumed", "repaired", "agent_start"]
    rep = list(fresh.entries())[2]
    assert rep["dropped_bytes"] == len(b'{"v":1,"seq":2,"prev":"ab')
    after = verify_ledger(home, retention_limit_s=30)
    assert after.ok, after.problems
    assert after.repairs == [{"seq": 2, "t": rep["t"], "dropped_bytes": rep["dropped_bytes"]}]
    assert after.head == {"seq": 3, "hash": e["hash"]}


def test_torn_tail_is_repaired_when_the_state_was_read_first(home, ledger):
    # a restarted agent reads its state (open items, counts) before its first append;
    # that read must not make the append skip the repair of a torn last line
    ledger.append("agent_start")
    with open(home.ledger_path, "ab") as f:
        f.write(b'{"v":2,"seq":1,"prev":"ab')
    fresh = Ledger(home, Keystore(home).device_key())
    fresh.open_items()
    fresh.state()
    fresh.append("agent_start")
    assert [x["event"] for x in fresh.entries()] == ["agent_start", "repaired", "agent_start"]
    assert fresh.damaged == 0
    r = verify_ledger(home, retention_limit_s=30)
    assert r.ok, r.problems


def test_whole_entry_missing_only_its_newline_is_kept(home, ledger):
    ledger.append("agent_start")
    ledger.append("resumed")
    data = home.ledger_path.read_bytes()
    home.ledger_path.write_bytes(data[:-1])  # crash after the entry but before its newline
    fresh = Ledger(home, Keystore(home).device_key())
    fresh.append("agent_stop")
    assert [x["event"] for x in fresh.entries()] == ["agent_start", "resumed", "agent_stop"]
    assert verify_ledger(home, retention_limit_s=30).ok


# -- a damaged ledger never stops appending (issue 12, finding 6) ----------------------

def test_garbage_last_line_does_not_block_append(home, ledger):
    # Finding 6: one garbage line used to stop every later append (and so all destruction).
    ledger.append("agent_start")
    with open(home.ledger_path, "ab") as f:
        f.write(b"garbage\n")
    lg = Ledger(home, Keystore(home).device_key())
    e = lg.append("resumed")
    assert e["seq"] == 2  # 0 agent_start, 1 alarm, 2 resumed
    assert lg.damaged == 1


def test_garbage_line_is_recorded_as_an_alarm_once(home, ledger):
    ledger.append("agent_start")
    with open(home.ledger_path, "ab") as f:
        f.write(b"garbage\n")
    lg = Ledger(home, Keystore(home).device_key())
    lg.append("resumed")
    Ledger(home, Keystore(home).device_key()).append("paused", until=None)  # a later process
    events = [x["event"] for x in Ledger(home).entries()]
    assert events == ["agent_start", "alarm", "resumed", "paused"]
    alarm = next(x for x in Ledger(home).entries() if x["event"] == "alarm")
    assert (alarm["check"], alarm["lines"]) == ("damaged_line", 1)


def test_garbage_line_is_reported_by_the_verifier(home, ledger):
    ledger.append("agent_start")
    with open(home.ledger_path, "ab") as f:
        f.write(b"garbage\n")
    Ledger(home, Keystore(home).device_key()).append("resumed")
    r = verify_ledger(home, retention_limit_s=30)
    assert not r.ok and r.messages("json") == ["line 2: not valid JSON"]
    assert r.damaged_lines == 1 and r.alarms[0]["lines"] == 1


def test_garbage_line_in_the_middle_does_not_block_reading(home, ledger):
    ledger.append("agent_start")
    with open(home.ledger_path, "ab") as f:
        f.write(b"{\"not\": \"an entry\"}\n")
    ledger.append("resumed")
    assert [x["event"] for x in Ledger(home).entries()] == ["agent_start", "alarm", "resumed"]


def test_verify_needs_no_passphrase(home, monkeypatch):
    from agent import keystore

    monkeypatch.setattr(keystore, "SCRYPT_N", 2 ** 10)
    ks = Keystore(home, b"participant secret").ensure()
    Ledger(home, ks.device_key()).append("agent_start")
    r = verify_ledger(home, retention_limit_s=30)  # reads keys/device.pub only
    assert r.ok and r.device_key_id == ks.device_key_id()


def test_verify_a_ledger_file_directly(home, ledger, keys):
    ledger.append("agent_start")
    r = verify_ledger(home.ledger_path, public_key=keys.device_public(), retention_limit_s=30)
    assert r.ok and r.entries == 1


def test_missing_ledger_is_reported(home, keys):
    r = verify_ledger(home, retention_limit_s=30)
    assert not r.ok and r.messages("missing") == [f"{home.ledger_path}: no ledger here"]


def test_home_policy_supplies_the_default_limit(home, ledger, default_policy):
    import shutil
    from pathlib import Path

    shutil.copyfile(Path(__file__).resolve().parent.parent / "policies" / "default.toml", home.root / "policy.toml")
    ledger.append("agent_start")
    r = verify_ledger(home)
    assert r.limit_s == default_policy.retention.raw_seconds


def test_no_limit_and_no_home_policy_is_a_note(home, ledger):
    ledger.append("agent_start")
    r = verify_ledger(home)
    assert r.limit_s is None and any("retention limits not checked" in n for n in r.notes)


def test_a_policy_object_is_not_a_limit(home, ledger, default_policy):
    ledger.append("agent_start")
    with pytest.raises(ValueError, match="retention_limit_s must be a finite number of seconds"):
        verify_ledger(home, retention_limit_s=default_policy)


def test_negative_limit_refused(home, ledger):
    with pytest.raises(ValueError, match="retention_limit_s"):
        verify_ledger(home, retention_limit_s=-1)


# -- retention -------------------------------------------------------------------------

def test_destruction_within_window_is_fine(home, ledger, clock):
    lifecycle(ledger, clock, 1, complete_at=T0, destroyed_at=T0 + 1.5)
    r = verify_ledger(home, retention_limit_s=30, now=T0 + 100)
    assert r.ok and r.violations == [] and r.exposures == [1.5]


def test_late_destruction_is_flagged(home, ledger, clock):
    lifecycle(ledger, clock, 1, complete_at=T0, destroyed_at=T0 + 45.0)
    r = verify_ledger(home, retention_limit_s=30, now=T0 + 100)
    assert not r.ok
    (v,) = r.violations
    assert v["check"] == "late" and v["item"] == item(1) and v["exposure_s"] == 45.0
    assert v["message"] == f"entry 2: audio item {item(1)} destroyed 45.0 s after it was complete (limit 30 s)"


def test_late_recorded_exposure_is_flagged(home, ledger, clock):
    # The entry is written promptly but records that the file lived too long.
    lifecycle(ledger, clock, 1, complete_at=T0, destroyed_at=T0 + 2.0, exposure_s=31.0)
    r = verify_ledger(home, retention_limit_s=30, now=T0 + 100)
    assert [v["check"] for v in r.violations] == ["late"]


def test_missing_destruction_flagged_past_window(home, ledger, clock):
    clock.t = T0
    ledger.append("received", item=item(7), kind="gps", bytes=2048, complete_at=T0)
    r = verify_ledger(home, retention_limit_s=30, now=T0 + 31.0)
    assert not r.ok and r.pending == []
    (v,) = r.violations
    assert v["check"] == "not_destroyed" and v["age_s"] == 31.0
    assert "received but not destroyed 31.0 s after it was complete (limit 30 s)" in v["message"]


def test_pending_within_window_is_not_a_violation(home, ledger, clock):
    clock.t = T0
    ledger.append("received", item=item(7), kind="gps", bytes=2048, complete_at=T0)
    r = verify_ledger(home, retention_limit_s=30, now=T0 + 29.0)
    assert r.ok and r.violations == []
    assert [(p["item"], p["age_s"]) for p in r.pending] == [(item(7), 29.0)]


def test_exposure_statistics_match_numpy(home, ledger, clock):
    rng = np.random.default_rng(3)
    complete = T0 + np.cumsum(rng.uniform(5, 60, size=31))
    delay = rng.gamma(2.0, 0.4, size=31)
    for i, (c, d) in enumerate(zip(complete, delay, strict=True)):
        lifecycle(ledger, clock, i, kind="accel", complete_at=float(c), destroyed_at=float(c + d))
    r = verify_ledger(home, retention_limit_s=30, now=float(complete[-1]) + 100)
    expected = (complete + delay) - complete  # from the test's own timestamps
    e = r.exposure
    assert e["n"] == 31
    # numpy's default percentile method ("linear", Hyndman and Fan type 7)
    assert e["median_s"] == pytest.approx(float(np.median(expected)), abs=1e-6)
    assert e["p95_s"] == pytest.approx(float(np.percentile(expected, 95)), abs=1e-6)
    assert e["max_s"] == pytest.approx(float(expected.max()), abs=1e-6)
    assert digest(r)["p95_exposure_s"] == e["p95_s"]


def test_exposure_of_an_empty_ledger_has_the_same_names(home, ledger):
    # one set of names with units (agent.stats.exposure_summary) for status, verify, report and bundles
    ledger.append("agent_start")
    assert verify_ledger(home, retention_limit_s=30).exposure == {"n": 0, "median_s": None, "p95_s": None,
                                                                   "max_s": None}


def test_counts_kinds_and_rejections(home, ledger, clock):
    lifecycle(ledger, clock, 1, kind="audio", complete_at=T0, destroyed_at=T0 + 1)
    clock.t = T0 + 2
    ledger.append("received", item=item(2), kind="unknown", bytes=5, complete_at=T0 + 2)
    ledger.append("rejected", item=item(2), kind="unknown", reason="unknown_format")
    ledger.append("destroyed", item=item(2), kind="unknown", complete_at=T0 + 2, exposure_s=0.1)
    ledger.append("coded", counts={"place": 3, "sound": 2})
    ledger.append("exported", bundle_seq=1, digest="c" * 64)
    r = verify_ledger(home, retention_limit_s=30, now=T0 + 10)
    assert r.ok, r.problems
    assert r.counts == {"received": 2, "featurised": 1, "destroyed": 2, "rejected": 1, "coded": 1, "exported": 1}
    assert r.kinds["audio"] == {"received": 1, "featurised": 1, "rejected": 0, "destroyed": 1}
    assert r.kinds["unknown"] == {"received": 1, "featurised": 0, "rejected": 1, "destroyed": 1}
    assert r.rejections == {"unknown_format": 1}
    assert r.exports == [{"seq": 7, "t": T0 + 2, "bundle_seq": 1, "digest": "c" * 64}]
    assert sum(r.daily[d]["audio"] for d in r.daily if "audio" in r.daily[d]) == 1


def test_digest_layout(home, ledger, clock):
    lifecycle(ledger, clock, 1, complete_at=T0, destroyed_at=T0 + 2.0)
    r = verify_ledger(home, retention_limit_s=30, now=T0 + 10)
    d = digest(r)
    assert set(d) == {"counts", "max_exposure_s", "median_exposure_s", "p95_exposure_s", "violations", "head"}
    assert d["head"] == ledger.head() and d["violations"] == 0 and d["max_exposure_s"] == 2.0
    json.dumps(d, allow_nan=False)  # travels in bundles as canonical JSON


def test_report_to_dict_is_json(home, ledger, clock):
    lifecycle(ledger, clock, 1, complete_at=T0, destroyed_at=T0 + 2.0)
    json.dumps(verify_ledger(home, retention_limit_s=30, now=T0 + 10).to_dict(), allow_nan=False)


def test_summary_holds_no_item_ids(home, ledger, clock):
    lifecycle(ledger, clock, 1, complete_at=T0, destroyed_at=T0 + 2.0)
    text = verify_ledger(home, retention_limit_s=30, now=T0 + 10).summary()
    assert "OK" in text and item(1) not in text


def test_other_signing_key_detected_by_verifier(home, clock):
    # Entries signed by a key that is not the device's fail (and say which key).
    Keystore(home).ensure()
    Ledger(home, Ed25519PrivateKey.generate(), clock=clock).append("agent_start")
    r = verify_ledger(home, retention_limit_s=30)
    assert r.messages("signature")[0].startswith("no entry's signature verifies with device key")


# -- crash safety ------------------------------------------------------------------------

def test_repair_at_every_cut_inside_the_last_line(home, keys, tmp_path):
    lg = Ledger(home, keys.device_key())
    lg.append("agent_start")
    lg.append("received", item=item(1), kind="mood", bytes=10, complete_at=T0)
    anchor = home.ledger_head_path.read_bytes()  # a crash mid-write leaves the anchor one behind
    lg.append("rejected", item=item(1), kind="mood", reason="bad_rating")
    data = home.ledger_path.read_bytes()
    last_start = data.rstrip(b"\n").rfind(b"\n") + 1
    for cut in range(last_start + 1, len(data) - 1, 11):  # len - 1 (only the newline lost) is tested above
        home.ledger_path.write_bytes(data[:cut])
        home.ledger_head_path.write_bytes(anchor)
        Ledger(home, keys.device_key()).append("resumed")
        events = [e["event"] for e in Ledger(home).entries()]
        assert events == ["agent_start", "received", "repaired", "resumed"], cut
        r = verify_ledger(home, retention_limit_s=1e9, now=T0)
        assert r.ok, (cut, r.problems)
        assert r.repairs[0]["dropped_bytes"] == cut - last_start


def _append_forever(root):
    from agent.home import Home

    home = Home(root)
    lg = Ledger(home, Keystore(home).device_key())
    i = 0
    while True:
        lg.append_many([("received", dict(item=item(i), kind="accel", bytes=100, complete_at=T0)),
                        ("destroyed", dict(item=item(i), kind="accel", complete_at=T0, exposure_s=0.1))])
        i += 1


@pytest.mark.slow
def test_sigkill_during_appends_leaves_a_verifiable_ledger(home, keys):
    import signal
    import time

    ctx = multiprocessing.get_context("fork")
    for round_ in range(4):
        lines_before = home.ledger_path.read_bytes().count(b"\n") if home.ledger_path.exists() else 0
        p = ctx.Process(target=_append_forever, args=(str(home.root),))
        p.start()
        # kill while it appends: wait (on a loaded machine) until its first group is written
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and (not home.ledger_path.exists()
                                               or home.ledger_path.read_bytes().count(b"\n") <= lines_before):
            time.sleep(0.01)
        time.sleep(0.05 + 0.05 * round_)
        os.kill(p.pid, signal.SIGKILL)
        p.join(10)
        r = verify_ledger(home, retention_limit_s=1e9, now=T0)
        # a kill can tear the last line, and nothing else
        assert {x["check"] for x in r.problems} <= {"truncation"}, r.problems
        Ledger(home, keys.device_key()).append("agent_start")  # the restarted agent
        after = verify_ledger(home, retention_limit_s=1e9, now=T0)
        assert after.ok, after.problems
