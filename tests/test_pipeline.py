"""The per-file intake pipeline: order of steps, idempotence, rejection, pause, deadlines, counts."""

from __future__ import annotations

import os
import time

import pytest

from intake_samples import T0, age_files, drop, make_home, mood_csv_bytes, our_files, stamp, valid_set, wav_bytes


@pytest.fixture
def policy(h):
    return h.load_policy()


def _ledger(h):
    from agent.ledger import Ledger

    return list(Ledger(h).entries())


def _drain(h, policy, **kw):
    from agent.intake.pipeline import drain

    return drain(h, policy, settle_s=0.0, **kw)


def _non_gps(policy):
    return {n: d for n, d in valid_set(policy).items() if ".gps." not in n}


def test_valid_files_are_featurised_and_destroyed(h, policy):
    from agent.ledger import verify_ledger
    from agent.vault import Vault

    files = _non_gps(policy)
    for name, data in files.items():
        drop(h.inbox, name, data)
    rep = _drain(h, policy)
    assert our_files(h.inbox) == []
    assert rep.total("featurised") == len(files)
    assert rep.total("destroyed") == len(files)
    with Vault.open(h) as v:
        assert v.count("audio_features") == 1
        assert v.count("accel_features") == 1
        assert v.count("mood_reports") == 2
    report = verify_ledger(h)
    assert report.ok, report.problems + report.violations


def test_ledger_order_per_item_is_received_featurised_destroyed(h, policy):
    drop(h.inbox, f"snd_{stamp(T0)}.wav", wav_bytes())
    _drain(h, policy)
    events = [e["event"] for e in _ledger(h) if "item" in e]
    assert events == ["received", "featurised", "destroyed"]


def test_item_id_is_keyed_mac_prefix(h, policy):
    # The item id is the first 32 hex digits of HMAC-SHA256(content key, bytes): RFC 2104.
    import hashlib
    import hmac

    from agent.keystore import Keystore

    data = wav_bytes(seed=3)
    drop(h.inbox, f"snd_{stamp(T0)}.wav", data)
    _drain(h, policy)
    key = Keystore(h).content_key()
    expected = hmac.new(key, data, hashlib.sha256).hexdigest()[:32]
    received = [e for e in _ledger(h) if e["event"] == "received"]
    assert received[0]["item"] == expected
    assert expected != hashlib.sha256(data).hexdigest()[:32]  # never an unkeyed hash


def test_same_bytes_twice_write_rows_once(h, policy):
    from agent.vault import Vault

    data = wav_bytes(seed=1)
    drop(h.inbox, f"a_{stamp(T0)}.wav", data)
    first = _drain(h, policy)
    drop(h.inbox, f"b_{stamp(T0)}.wav", data)
    second = _drain(h, policy)
    assert first.rows == 1 and second.rows == 0
    assert second.duplicate == {"audio": 1}
    with Vault.open(h) as v:
        assert v.count("audio_features") == 1
    assert our_files(h.inbox) == []


def test_rejected_file_is_destroyed_with_reason(h, policy):
    drop(h.inbox, f"snd_{stamp(T0)}.wav", wav_bytes(seconds=1.0))  # policy wants 3 s +- 0.25 s
    rep = _drain(h, policy)
    assert our_files(h.inbox) == []
    assert rep.reasons == {"wrong_length": 1}
    assert "wrong_length" in rep.errors[0] and f"snd_{stamp(T0)}.wav" in rep.errors[0]
    rejected = [e for e in _ledger(h) if e["event"] == "rejected"]
    assert rejected[0]["reason"] == "wrong_length"


def test_unknown_suffix_is_rejected_and_destroyed(h, policy):
    drop(h.inbox, "notes.txt", b"dear diary")
    rep = _drain(h, policy)
    assert rep.reasons == {"unknown_format": 1}
    assert rep.destroyed == {"unknown": 1}
    assert our_files(h.inbox) == []


def test_paused_keeps_nothing_but_destroys(h, policy):
    from agent.pause import set_paused
    from agent.vault import Vault

    set_paused(h)
    for name, data in _non_gps(policy).items():
        drop(h.inbox, name, data)
    rep = _drain(h, policy)
    assert our_files(h.inbox) == []
    assert rep.total("featurised") == 0
    assert rep.reasons == {"paused": 3}
    with Vault.open(h) as v:
        assert v.count("audio_features") == v.count("accel_features") == v.count("mood_reports") == 0


def test_scan_orders_oldest_deadline_first(h, policy):
    from agent.intake.pipeline import Intake

    drop(h.inbox, "z_first.mood.csv", mood_csv_bytes(policy, n=1))
    time.sleep(0.05)
    drop(h.inbox, "a_second.mood.csv", mood_csv_bytes(policy, n=2))
    with Intake(h, policy) as it:
        ready, settling, _ = it.scan(settle_s=0.0)
    assert [c.name for c in ready] == ["z_first.mood.csv", "a_second.mood.csv"]
    assert settling == []


def test_backdated_mtime_does_not_hide_exposure(h, policy):
    # utime can back-date mtime but not ctime: complete_at follows the later of the two.
    from agent.intake.scan import complete_time

    p = drop(h.inbox, "x.mood.csv", mood_csv_bytes(policy))
    os.utime(p, (T0, T0))
    st = os.lstat(p)
    assert complete_time(st, time.time()) == pytest.approx(st.st_ctime)
    assert complete_time(st, time.time()) > T0 + 1000


def test_future_timestamp_is_capped_at_judgement(h, policy):
    from agent.intake.scan import complete_time

    p = drop(h.inbox, "x.mood.csv", mood_csv_bytes(policy))
    judged = time.time()
    os.utime(p, (judged + 3600, judged + 3600))
    assert complete_time(os.lstat(p), judged) == judged


def test_file_still_being_written_waits_for_settle(h, policy):
    from agent.intake.pipeline import Intake

    (h.inbox / "x.mood.csv").write_bytes(mood_csv_bytes(policy))
    with Intake(h, policy) as it:
        ready, settling, _ = it.scan(settle_s=30.0)
    assert ready == [] and [c.name for c in settling] == ["x.mood.csv"]


def test_reconcile_closes_item_unlinked_before_destroyed_entry(h, policy):
    # A run killed after unlink but before 'destroyed': the next run closes the item.
    from agent.intake.pipeline import open_items
    from agent.keystore import Keystore
    from agent.ledger import Ledger, verify_ledger

    lg = Ledger(h, signing_key=Keystore(h).ensure().device_key())
    lg.append("received", item="ab" * 16, kind="audio", bytes=10, complete_at=time.time() - 1)
    assert "ab" * 16 in open_items(lg)
    rep = _drain(h, policy)
    assert rep.recovered == 1
    assert open_items(lg) == {}
    assert verify_ledger(h).ok


def test_intake_counts_from_ledger_and_inbox(h, policy):
    from agent.intake.report import intake_counts

    drop(h.inbox, f"snd_{stamp(T0)}.wav", wav_bytes())
    drop(h.inbox, "bad.mood.csv", b"time\n")
    _drain(h, policy)
    (h.inbox / "waiting.mood.csv").write_bytes(b"x")
    c = intake_counts(h)
    assert c["received"] == {"audio": 1, "mood": 1}
    assert c["featurised"] == {"audio": 1}
    assert c["rejected"] == {"mood": 1}
    assert c["destroyed"] == {"audio": 1, "mood": 1}
    assert c["inbox"]["files"] == 1 and c["inbox"]["limit_s"] == 30.0
    assert c["inbox"]["in_subfolders"] == 0 and c["inbox"]["unfinished"] == 0
    assert 0 <= c["inbox"]["oldest_age_s"] < 30.0


def test_ledger_and_log_hold_no_name_nor_content(h, policy):
    from agent.intake.watcher import run_agent

    name = f"secret-place_{stamp(T0)}.mood.csv"
    data = mood_csv_bytes(policy)
    drop(h.inbox, name, data)
    drop(h.inbox, "broken-secret.wav", b"RIFF-not-really")
    age_files(h.inbox)
    run_agent(h, policy, once=True, settle_s=0.0, warm=False)
    ledger_text = h.ledger_path.read_text()
    log_text = (h.logs / "agent.log").read_text()
    for text in (ledger_text, log_text):
        assert "secret" not in text
        assert data.decode().splitlines()[1] not in text


def test_drain_report_text_and_dict(h, policy):
    drop(h.inbox, f"snd_{stamp(T0)}.wav", wav_bytes())
    rep = _drain(h, policy)
    d = rep.as_dict()
    assert d["received"] == {"audio": 1} and d["exposure"]["n"] == 1
    assert "received 1 (audio 1)" in rep.text()


def test_exposure_percentiles_match_numpy():
    # Hyndman and Fan type 7 is numpy.percentile's default ("linear").
    import numpy as np

    from agent.intake.report import exposure_stats

    xs = [0.3, 5.0, 0.01, 2.2, 9.9, 0.7, 1.1]
    got = exposure_stats(xs)
    assert got["median_s"] == pytest.approx(np.percentile(xs, 50), abs=1e-4)
    assert got["p95_s"] == pytest.approx(np.percentile(xs, 95), abs=1e-4)
    assert got["max_s"] == max(xs) and got["n"] == 7
    assert exposure_stats([])["median_s"] is None


def test_file_past_its_deadline_is_taken_and_flagged_late(tmp_path):
    # The agent was not running: the file is processed at once and its true
    # exposure recorded, so the audit sees it late instead of a fresh start time.
    from agent.intake.pipeline import drain
    from agent.ledger import verify_ledger

    h = make_home(tmp_path / "home", raw_seconds=1, settle_seconds=0.1)
    drop(h.inbox, "m.mood.csv", b"time\n")
    time.sleep(1.3)
    rep = drain(h, h.load_policy(), settle_s=0.0)
    assert our_files(h.inbox) == []
    assert rep.over_limit == 1 and rep.exposure["max_s"] > 1.0
    report = verify_ledger(h)
    assert [v["check"] for v in report.violations] == ["late"]


@pytest.mark.timeout(60)
def test_ledger_that_cannot_be_written_does_not_stop_destruction(h, policy, monkeypatch):
    """Finding 5, injected ENOSPC (the real full disk is in tests/test_intake_disk_full.py)."""
    from agent.intake.pipeline import Intake, drain

    it = Intake(h, policy)

    def full_disk(*a, **k):
        raise OSError(28, "No space left on device")

    real = it.ledger.append_many
    it.ledger.append("agent_start", mode="once")         # as run_agent does before anything else
    monkeypatch.setattr(it.ledger, "append_many", full_disk)
    drop(h.inbox, "a.mood.csv", mood_csv_bytes(policy))
    try:
        rep = drain(h, policy, settle_s=0.0, intake=it)
        assert our_files(h.inbox) == []                  # destroyed by its deadline all the same
        assert rep.total("destroyed") == 1
        assert any("could not be written" in s for s in rep.skipped)
        assert it.log.failures <= 3                      # backed off instead of spinning
        events = [e for e, _ in it.log.pending]
        assert events == ["received", "featurised", "destroyed"]
        monkeypatch.setattr(it.ledger, "append_many", real)
        assert it.log.flush(force=True)                  # recorded as soon as the ledger takes it
    finally:
        it.close()
