"""The watcher: readiness rules, native events, start-up sweep, idle blocking, lock, CLI."""

from __future__ import annotations

import json
import os
import queue
import subprocess
import sys
import threading
import time

import pytest

from intake_samples import REPO, T0, age_files, drop, mood_csv_bytes, our_files, stamp, wav_bytes

WAIT_S = 30.0  # upper bound for an event to show up before a test fails; never a measured figure


@pytest.fixture
def intake(h):
    from agent.intake.pipeline import Intake

    it = Intake(h, h.load_policy())
    yield it
    it.close()


def _wait_for(cond, what: str):
    end = time.monotonic() + WAIT_S
    while time.monotonic() < end:
        if cond():
            return
        time.sleep(0.02)
    raise AssertionError(f"gave up waiting for {what}")


# -- native events --------------------------------------------------------------
def _observed(h, action, want):
    """Run ``action`` under a real watchdog observer; return once ``want`` is queued."""
    from agent.intake.watcher import InboxWatcher

    from agent.intake.pipeline import Intake

    with Intake(h, h.load_policy()) as it:
        w = InboxWatcher(it)
        w.start()
        try:
            action()
            seen = []
            end = time.monotonic() + WAIT_S
            while time.monotonic() < end:
                try:
                    msg = w.q.get(timeout=0.5)
                except queue.Empty:
                    continue
                seen.append(msg)
                if msg == want:
                    return seen
            raise AssertionError(f"{want} never observed; saw {seen}")
        finally:
            w.stop()


def test_close_after_write_is_reported(h):
    def write():
        with open(h.inbox / "m.mood.csv", "wb") as f:
            f.write(b"time\n")

    seen = _observed(h, write, ("closed", "m.mood.csv"))
    assert ("changed", "m.mood.csv") in seen  # created first: not yet complete


def test_rename_into_place_is_reported_as_moved(h):
    seen = _observed(h, lambda: drop(h.inbox, "m.mood.csv", b"x"), ("moved", "m.mood.csv"))
    assert ("gone", "m.mood.csv.part") in seen


def test_move_in_from_outside_the_inbox_is_reported_as_moved(h, tmp_path):
    src = h.root / "staging.tmp"  # same file system, outside the inbox
    src.write_bytes(b"x")
    _observed(h, lambda: os.replace(src, h.inbox / "m.mood.csv"), ("moved", "m.mood.csv"))


# -- readiness rules (driven directly) --------------------------------------------------
def test_part_and_dot_names_wait_for_the_window_not_a_close(intake):
    from agent.intake.watcher import InboxWatcher

    w = InboxWatcher(intake)
    (intake.home.inbox / "a.wav.part").write_bytes(b"x")
    (intake.home.inbox / ".b.wav").write_bytes(b"x")
    w._note("a.wav.part", "closed")
    w._note(".b.wav", "moved")
    assert set(w.pending) == {"a.wav.part", ".b.wav"}
    assert all(p.unfinished and not p.ready for p in w.pending.values())
    for p in w.pending.values():
        p.first_seen -= intake.raw_seconds   # the window has passed
    w._check_pending()
    assert all(p.ready for p in w.pending.values())


def test_change_waits_for_settle_then_ready_when_unchanged(intake):
    from agent.intake.watcher import InboxWatcher

    (intake.home.inbox / "a.mood.csv").write_bytes(b"x")
    w = InboxWatcher(intake, settle_s=5.0)
    w._note("a.mood.csv", "changed")
    w._check_pending()
    assert not w.pending["a.mood.csv"].ready
    w.pending["a.mood.csv"].due = 0.0  # the settle time has passed
    w._check_pending()
    assert w.pending["a.mood.csv"].ready


def test_change_during_settle_restarts_it(intake):
    from agent.intake.watcher import InboxWatcher

    p = intake.home.inbox / "a.mood.csv"
    p.write_bytes(b"x")
    w = InboxWatcher(intake, settle_s=5.0)
    w._note("a.mood.csv", "changed")
    with open(p, "ab") as f:
        f.write(b"more")
    w.pending["a.mood.csv"].due = 0.0
    w._check_pending()
    assert not w.pending["a.mood.csv"].ready
    assert w.pending["a.mood.csv"].due > time.time()


def test_unfinished_writer_is_cut_off_at_half_the_window(intake):
    from agent.intake.watcher import InboxWatcher

    (intake.home.inbox / "a.mood.csv").write_bytes(b"x")
    w = InboxWatcher(intake, settle_s=5.0)
    w._note("a.mood.csv", "changed")
    w.pending["a.mood.csv"].first_seen -= intake.raw_seconds  # seen long ago, still changing
    w._check_pending()
    assert w.pending["a.mood.csv"].ready


def test_close_and_move_are_ready_at_once(intake):
    from agent.intake.watcher import InboxWatcher

    for n in ("a.mood.csv", "b.mood.csv"):
        (intake.home.inbox / n).write_bytes(b"x")
    w = InboxWatcher(intake, settle_s=60.0)
    w._handle("closed", "a.mood.csv")
    w._handle("moved", "b.mood.csv")
    assert w.pending["a.mood.csv"].ready and w.pending["b.mood.csv"].ready


def test_own_close_is_not_taken_as_a_writer_finishing(intake):
    from agent.intake.watcher import InboxWatcher

    (intake.home.inbox / "a.mood.csv").write_bytes(b"x")
    w = InboxWatcher(intake, settle_s=60.0)
    w.own_closes["a.mood.csv"] = 1
    w._handle("closed", "a.mood.csv")
    assert not w.pending["a.mood.csv"].ready


def test_non_regular_entries_are_ready_at_once(intake, tmp_path):
    from agent.intake.watcher import InboxWatcher

    os.symlink(tmp_path / "x", intake.home.inbox / "l.wav")
    w = InboxWatcher(intake, settle_s=60.0)
    w._note("l.wav", "changed")
    assert w.pending["l.wav"].ready


def test_files_in_a_new_subfolder_become_pending(intake):
    from agent.intake.watcher import InboxWatcher

    (intake.home.inbox / "d").mkdir()
    (intake.home.inbox / "d" / "x.wav").write_bytes(b"RIFF")
    w = InboxWatcher(intake)
    w._note("d", "dir")
    assert set(w.pending) == {"d/x.wav"}


def test_no_pending_file_means_no_timeout(intake):
    from agent.intake.watcher import InboxWatcher

    w = InboxWatcher(intake)
    assert w._next_timeout() is None  # the loop blocks on the queue: no polling


# -- the running agent -----------------------------------------------------------------
def _start_agent(h, **kw):
    from agent.intake.watcher import run_agent

    stop = threading.Event()
    ready = threading.Event()
    result = {}

    def target():
        result["report"] = run_agent(h, h.load_policy(), stop_event=stop, warm=False,
                                     on_ready=lambda s: ready.set(), **kw)

    t = threading.Thread(target=target, daemon=True)
    t.start()
    assert ready.wait(WAIT_S), "agent never became ready"
    return stop, t, result


def test_agent_sweeps_then_takes_new_files_and_stops(h):
    policy = h.load_policy()
    drop(h.inbox, "before.mood.csv", mood_csv_bytes(policy, n=1))
    age_files(h.inbox)
    stop, t, result = _start_agent(h, settle_s=0.2)
    try:
        _wait_for(lambda: our_files(h.inbox) == [], "the start-up sweep")
        drop(h.inbox, "renamed.mood.csv", mood_csv_bytes(policy, n=2))
        with open(h.inbox / f"written_{stamp(T0)}.wav", "wb") as f:
            f.write(wav_bytes())
        _wait_for(lambda: our_files(h.inbox) == [], "new files to be taken")
    finally:
        stop.set()
        t.join(WAIT_S)
    rep = result["report"]
    assert rep.featurised == {"mood": 2, "audio": 1}
    assert rep.total("destroyed") == 3


def test_idle_agent_does_not_wake(h):
    from agent.intake import watcher as wmod

    loops = []
    real_run = wmod.InboxWatcher.run

    def spy(self):
        loops.append(self)
        return real_run(self)

    wmod.InboxWatcher.run = spy
    try:
        stop, t, _ = _start_agent(h)
        w = loops[0]
        before = w.wakeups
        time.sleep(1.0)  # idle: a polling loop would wake many times here
        idle_wakeups = w.wakeups - before
        stop.set()
        t.join(WAIT_S)
    finally:
        wmod.InboxWatcher.run = real_run
    assert idle_wakeups == 0


def test_second_agent_on_the_same_home_is_refused(h):
    from agent.errors import StateError
    from agent.intake.watcher import run_agent

    stop, t, _ = _start_agent(h)
    try:
        with pytest.raises(StateError, match="another lethe process"):
            run_agent(h, h.load_policy(), once=True, warm=False)
    finally:
        stop.set()
        t.join(WAIT_S)


def test_cli_run_once_json(h):
    policy = h.load_policy()
    drop(h.inbox, "a.mood.csv", mood_csv_bytes(policy))
    drop(h.inbox, "b.txt", b"?")
    age_files(h.inbox)
    env = dict(os.environ, LETHE_NO_KEYRING="1")
    cp = subprocess.run([sys.executable, "-m", "agent.cli", "--home", str(h.root), "run", "--once", "--json"],
                        capture_output=True, text=True, cwd=REPO, env=env, timeout=120)
    assert cp.returncode == 0, cp.stderr
    rep = json.loads(cp.stdout)
    assert rep["featurised"] == {"mood": 1} and rep["reasons"] == {"unknown_format": 1}
    assert our_files(h.inbox) == []


def test_cli_run_once_plain_summary(h):
    drop(h.inbox, "b.txt", b"?")
    age_files(h.inbox)
    env = dict(os.environ, LETHE_NO_KEYRING="1")
    cp = subprocess.run([sys.executable, "-m", "agent.cli", "--home", str(h.root), "run", "--once"],
                        capture_output=True, text=True, cwd=REPO, env=env, timeout=120)
    assert cp.returncode == 0, cp.stderr
    assert "rejected 1 (unknown_format 1)" in cp.stdout and "b.txt" in cp.stdout


def test_cli_rejects_bad_settle(h):
    env = dict(os.environ, LETHE_NO_KEYRING="1")
    cp = subprocess.run([sys.executable, "-m", "agent.cli", "--home", str(h.root), "run", "--settle", "-1"],
                        capture_output=True, text=True, cwd=REPO, env=env, timeout=60)
    assert cp.returncode == 2 and "--settle" in cp.stderr


@pytest.mark.timeout(120)
def test_cli_watch_prints_ready_takes_files_and_stops_on_sigterm(h):
    import signal

    env = dict(os.environ, LETHE_NO_KEYRING="1")
    p = subprocess.Popen([sys.executable, "-m", "agent.cli", "--home", str(h.root), "run", "--json"],
                         cwd=REPO, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        line = p.stderr.readline()
        assert line.startswith("lethe: watching ") and "ready in" in line
        drop(h.inbox, "a.mood.csv", mood_csv_bytes(h.load_policy()))
        _wait_for(lambda: our_files(h.inbox) == [], "the watching agent to take the file")
        p.send_signal(signal.SIGTERM)
        out, err = p.communicate(timeout=60)
    finally:
        if p.poll() is None:
            p.kill()
            p.communicate()
    assert p.returncode == 0, err
    assert json.loads(out)["featurised"] == {"mood": 1}


def test_cli_points_numba_cache_into_the_home(h):
    # numba reads NUMBA_CACHE_DIR when first imported (through librosa); the handler must set it first.
    code = ("import os, sys; os.environ.pop('NUMBA_CACHE_DIR', None)\n"
            "from agent.cli import main\n"
            "rc = main(['--home', sys.argv[1], 'run', '--once'])\n"
            "print(os.environ.get('NUMBA_CACHE_DIR'))\n")
    env = dict(os.environ, LETHE_NO_KEYRING="1")
    env.pop("NUMBA_CACHE_DIR", None)
    cp = subprocess.run([sys.executable, "-c", code, str(h.root)], capture_output=True, text=True, cwd=REPO,
                        env=env, timeout=120)
    assert cp.returncode == 0, cp.stderr
    assert cp.stdout.strip().splitlines()[-1] == str(h.numba_cache)


def test_own_closes_are_not_kept_for_files_renamed_aside(intake):
    """A long-running agent must not keep one entry per destroyed file (memory flat with backlog)."""
    from agent.intake.watcher import InboxWatcher

    from intake_samples import drop, mood_csv_bytes

    w = InboxWatcher(intake)
    for i in range(5):
        drop(intake.home.inbox, f"m{i}.mood.csv", mood_csv_bytes(intake.policy))
    w._take([f"m{i}.mood.csv" for i in range(5)])
    assert len(w.outcomes) == 5 and w.own_closes == {}
