"""Issue 12, intake side: one small test per finding (sparse files, subfolders and partials, a damaged
ledger, a restart mid-destruction, a file that kills the process, short-lived agents)."""

from __future__ import annotations

import json
import os
import time

import pytest

from intake_samples import T0, drop, make_home, mood_csv_bytes, our_files, stamp, wav_bytes


@pytest.fixture
def hp(tmp_path):
    h = make_home(tmp_path / "home")
    return h, h.load_policy()


def _drain(h, policy, **kw):
    from agent.intake.pipeline import drain

    return drain(h, policy, settle_s=0.0, **kw)


def _events(h):
    from agent.ledger import Ledger

    return [e for e in Ledger(h).entries()]


def _start(h):
    """The ledger's first entry, as run_agent writes it."""
    from agent.keystore import Keystore
    from agent.ledger import Ledger

    Ledger(h, signing_key=Keystore(h).ensure().device_key()).append("agent_start", mode="once")


# -- finding 2: sparse files ------------------------------------------------------------
def test_sparse_file_is_overwritten_only_where_it_holds_data(hp):
    """A 1 GiB sparse .wav: rejected too_large and destroyed, with at most its allocated blocks written."""
    from agent.intake.pipeline import Intake

    h, policy = hp
    p = h.inbox / "huge.wav"
    with open(p, "wb") as f:
        f.truncate(1 << 30)
        f.seek(1 << 29)
        f.write(b"\x7f" * 8192)
    allocated = os.stat(p).st_blocks * 512
    if allocated > 1 << 20:
        pytest.skip("this file system does not keep sparse files sparse")
    os.utime(p, (time.time() - 5, time.time() - 5))
    with Intake(h, policy) as it:
        outs = it.process_many(["huge.wav"])
    assert [o.reason for o in outs] == ["too_large"]
    assert outs[0].removed and not p.exists()
    assert outs[0].overwritten_bytes <= allocated   # never the apparent 1 GiB


# -- finding 7: subfolders, .part and hidden files ----------------------------------------
def test_stale_part_file_is_destroyed_unread_with_a_reason(hp):
    h, policy = hp
    p = h.inbox / f"snd_{stamp(T0)}.wav.part"
    p.write_bytes(wav_bytes())
    old = time.time() - policy.retention.raw_seconds - 5
    os.utime(p, (old, old))
    time.sleep(0.01)
    # ctime cannot be back-dated: judge the scan as if the window had passed
    from agent.intake.pipeline import Intake

    with Intake(h, policy) as it:
        ready, _, _ = it.scan(judged_at=time.time() + policy.retention.raw_seconds + 1)
        assert [c.unread for c in ready] == ["partial"]
        outs = it.process_many([c.name for c in ready], judged_at=time.time() + policy.retention.raw_seconds + 1)
    assert [(o.status, o.reason) for o in outs] == [("rejected", "partial")]
    assert not p.exists()
    ev = [(e["event"], e.get("reason")) for e in _events(h)]
    assert ev == [("received", None), ("rejected", "partial"), ("destroyed", None)]


def test_hidden_file_in_a_subfolder_is_destroyed_unread(hp):
    from agent.intake.pipeline import Intake

    h, policy = hp
    (h.inbox / "2026-11-04" / ".sync").mkdir(parents=True)
    p = h.inbox / "2026-11-04" / ".sync" / "snd.wav"
    p.write_bytes(wav_bytes())
    later = time.time() + policy.retention.raw_seconds + 1
    with Intake(h, policy) as it:
        ready, _, _ = it.scan(judged_at=later)
        outs = it.process_many([c.name for c in ready], judged_at=later)
    assert [o.reason for o in outs] == ["hidden"] and not p.exists()


def test_part_file_inside_the_window_waits(hp):
    h, policy = hp
    p = h.inbox / "snd.wav.part"
    p.write_bytes(b"RIFF")
    rep = _drain(h, policy)
    assert rep.total("received") == 0 and p.exists()


def test_status_counts_subfolders_and_partials(hp):
    from agent.intake.report import intake_counts

    h, policy = hp
    (h.inbox / "d").mkdir()
    (h.inbox / "d" / "a.wav").write_bytes(b"x")
    (h.inbox / "b.wav.part").write_bytes(b"x")
    (h.inbox / ".c").write_bytes(b"x")
    c = intake_counts(h, policy)["inbox"]
    assert (c["files"], c["in_subfolders"], c["unfinished"]) == (3, 1, 2)


# -- finding 6: a garbage ledger line never stops destruction --------------------------------
def test_garbage_ledger_line_does_not_stop_destruction(hp):
    from agent.intake.ledgerlog import read_alarm

    h, policy = hp
    _start(h)
    with open(h.ledger_path, "ab") as f:
        f.write(b"this is not a ledger entry\n")
    drop(h.inbox, "a.mood.csv", mood_csv_bytes(policy))
    os.utime(h.inbox / "a.mood.csv", (time.time() - 5, time.time() - 5))
    rep = _drain(h, policy)
    assert our_files(h.inbox) == []                          # destroyed all the same
    assert rep.total("destroyed") == 1
    alarm = read_alarm(h)
    if alarm is not None:                                    # the ledger refused to extend the damaged line
        assert alarm["reason"] == "ledger_unwritable" and alarm["pending"] >= 1
    from agent.intake.report import intake_counts

    assert intake_counts(h, policy)["alarm"] == alarm


# -- finding 11: a restart finishes a destruction it had begun --------------------------------
def test_restart_finishes_a_destruction_instead_of_receiving_its_remains(hp, monkeypatch):
    from agent.intake import safety
    from agent.intake.pipeline import Intake

    h, policy = hp
    _start(h)
    drop(h.inbox, "a.mood.csv", mood_csv_bytes(policy))
    os.utime(h.inbox / "a.mood.csv", (time.time() - 5, time.time() - 5))

    class Killed(BaseException):
        pass

    def die(*a, **k):   # the process dies after the overwrite, before the unlink
        raise Killed

    it = Intake(h, policy)
    monkeypatch.setattr(safety.InboxDir, "unlink_checked", die)
    with pytest.raises(Killed):
        it.process_many(["a.mood.csv"])
    monkeypatch.undo()
    it.close()
    left = os.listdir(h.inbox)
    assert len(left) == 1 and left[0].startswith(".lethe-destroying-")   # zero-filled remains, set aside
    rep = _drain(h, policy)
    assert our_files(h.inbox) == []
    assert rep.total("received") == 0 and rep.total("rejected") == 0      # its remains are not a new item
    ev = [e["event"] for e in _events(h)]
    assert ev.count("received") == 1 and ev.count("destroyed") == 1


# -- finding 10: a file that kills the process ----------------------------------------------
def test_file_taken_twice_without_outcome_is_destroyed_unparsed(hp):
    from agent.intake.pipeline import Intake

    h, policy = hp
    _start(h)
    drop(h.inbox, "a.mood.csv", mood_csv_bytes(policy))
    os.utime(h.inbox / "a.mood.csv", (time.time() - 5, time.time() - 5))
    with Intake(h, policy) as it:
        w = it._prepare("a.mood.csv", time.time())
        w.opened.close()
    for _ in range(2):   # two lives that died while parsing it: a begin mark and no end mark each
        with Intake(h, policy) as it:
            it.parsing.begin(w.out.item)
    rep = _drain(h, policy)
    assert rep.reasons == {"taken_twice": 1} and rep.total("featurised") == 0
    assert our_files(h.inbox) == []


# -- finding 12: short lives make progress ------------------------------------------------------
def test_first_group_after_a_start_is_one_file(hp):
    from agent.intake.pipeline import Intake

    h, policy = hp
    for i in range(5):
        drop(h.inbox, f"m{i}.mood.csv", mood_csv_bytes(policy, T0 + i * 7200))
    with Intake(h, policy) as it:
        assert it.group_files == 1
        from agent.intake.drain import adaptive_batches

        ready, _, _ = it.scan(settle_s=0.0)
        first = next(adaptive_batches(ready, it))
    assert len(first) == 1   # committed, and destroyed, before a second file is read


def test_drain_commits_each_group_before_reading_the_next(hp):
    h, policy = hp
    _start(h)
    for i in range(6):
        drop(h.inbox, f"m{i}.mood.csv", mood_csv_bytes(policy, T0 + i * 7200))
    _drain(h, policy)
    ev = [e["event"] for e in _events(h) if e["event"] in ("received", "destroyed")]
    # The first file is destroyed before the third is received (groups of 1, then 2, ...).
    assert ev.index("destroyed") < [i for i, e in enumerate(ev) if e == "received"][2]


# -- low: the log never holds a file name ------------------------------------------------------
def test_agent_log_holds_no_file_name(hp):
    from agent.intake.watcher import run_agent

    h, policy = hp
    drop(h.inbox, "secret-diary-name.mood.csv", b"time\nnot a time\n")
    drop(h.inbox, "another-secret.wav.part", b"x")
    run_agent(h, policy, once=True, settle_s=0.0)
    text = "".join(p.read_text() for p in h.logs.iterdir() if p.is_file())
    assert "secret" not in text


def test_alarm_file_is_json(hp):
    from agent.intake.ledgerlog import LedgerWriter

    h, policy = hp
    w = LedgerWriter(h, ledger=None)
    w.alarm("ledger_unwritable", OSError(28, "No space left on device"))
    doc = json.loads((h.state / "intake-alarm.json").read_text())
    assert doc["reason"] == "ledger_unwritable" and "No space left" in doc["error"]


# -- low: the service's log lists no names and is rotated ------------------------------------------
def test_run_under_the_service_logs_no_names_and_prints_nothing(hp):
    import subprocess
    import sys

    from intake_samples import REPO

    h, policy = hp
    drop(h.inbox, "private-name-of-a-diary.txt", b"x")   # rejected unknown_format: its name would be listed
    env = dict(os.environ, LETHE_SERVICE="1", PYTHONPATH=str(REPO))
    cp = subprocess.run([sys.executable, "-m", "agent.cli", "--home", str(h.root), "run", "--once", "--settle", "0"],
                        cwd=REPO, env=env, capture_output=True, text=True, timeout=120)
    assert cp.returncode == 0, cp.stderr
    assert "private-name" not in cp.stdout + cp.stderr         # what the service manager would persist
    log = (h.logs / "agent.log").read_text()
    assert "rejected 1 (unknown_format 1)" in log and "private-name" not in log


def test_redacted_report_has_counts_not_names(hp):
    from agent.intake.pipeline import drain

    h, policy = hp
    drop(h.inbox, "private-name.txt", b"x")
    rep = drain(h, policy, settle_s=0.0)
    assert any("private-name" in e for e in rep.errors)        # on a terminal the participant sees it
    red = rep.redacted()
    assert "private-name" not in red.text() and "1 file(s) rejected" in red.text()


def test_service_capture_file_is_rotated(tmp_path):
    from agent.participant.service import rotate_capture

    p = tmp_path / "service.out"
    p.write_bytes(b"x" * 3000)
    assert not rotate_capture(p, max_bytes=4096) and p.stat().st_size == 3000
    p.write_bytes(b"y" * 5000)
    assert rotate_capture(p, max_bytes=4096)
    assert p.stat().st_size == 0 and (tmp_path / "service.out.1").read_bytes() == b"y" * 5000


def test_service_unit_marks_the_service():
    from pathlib import Path

    from agent.participant.service import launchd_plist, systemd_unit

    assert "Environment=LETHE_SERVICE=1" in systemd_unit(Path("/h"), ["lethe"])
    assert "<key>LETHE_SERVICE</key>" in launchd_plist(Path("/h"), ["lethe"])


def test_pending_ledger_entries_survive_a_restart(hp, monkeypatch):
    """Entries the ledger could not take are kept in state/ledger-pending.json and appended by the next run."""
    from agent.intake.ledgerlog import LedgerWriter
    from agent.keystore import Keystore
    from agent.ledger import Ledger

    h, policy = hp
    _start(h)
    lg = Ledger(h, signing_key=Keystore(h).ensure().device_key())
    w = LedgerWriter(h, lg)

    def full_disk(*a, **k):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(lg, "append_many", full_disk)
    step = ("rejected", {"item": "ab" * 16, "kind": "mood", "reason": "paused"})
    assert not w.write([step])
    monkeypatch.undo()
    again = LedgerWriter(h, Ledger(h, signing_key=Keystore(h).ensure().device_key()))   # the next life
    assert again.pending == [step]
    assert again.flush(force=True)
    assert [e["event"] for e in _events(h)][-1] == "rejected"
    assert not (h.state / "ledger-pending.json").exists() and not (h.state / "intake-alarm.json").exists()
