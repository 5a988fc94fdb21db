"""Issue 15: the long-lived reader workers (one per core, jobs queued one ahead) keep issue 12's isolation.

A worker is killed from outside (SIGKILL, as the OOM killer does) or hangs while it parses one file: only
that file is affected, the file queued behind it is parsed by the next worker, answers keep the job order
and no file is answered twice.  The misbehaving reader is simulated by wrapping ``agent.intake.featurise``
in the parent before the fork (the worker inherits the wrapper): the worker is a real process that really
dies or hangs.
"""

from __future__ import annotations

import os
import signal
import threading
import time

import pytest

from intake_samples import T0, accel_bytes, make_home, mood_csv_bytes, stamp, wav_bytes

SLOW = b"lethe-test: wait to be killed\n"
HANG = b"lethe-test: hang the reader\n"


@pytest.fixture
def hp(tmp_path):
    h = make_home(tmp_path / "home")
    return h, h.load_policy()


@pytest.fixture
def killable_reader(monkeypatch, tmp_path):
    """A reader that, on a SLOW file, records its process id in ``pid_path`` and waits (to be killed)."""
    import agent.intake as ai

    real = ai.featurise
    pid_path = tmp_path / "worker.pid"

    def featurise(path, data, policy, *, now=None):
        if data.startswith(SLOW):
            pid_path.write_text(str(os.getpid()))
            time.sleep(3600)
        if data.startswith(HANG):
            time.sleep(3600)
        return real(path, data, policy, now=now)

    monkeypatch.setattr(ai, "featurise", featurise)
    return pid_path


def _kill_when_parsing(pid_path, timeout_s: float = 60.0) -> threading.Thread:
    """SIGKILL the worker once it has written its pid (it is then inside the reader)."""

    def run():
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            try:
                pid = int(pid_path.read_text())
            except (OSError, ValueError):
                time.sleep(0.01)
                continue
            os.kill(pid, signal.SIGKILL)
            return

    t = threading.Thread(target=run, daemon=True)
    t.start()
    return t


def test_worker_killed_mid_file_takes_only_that_file(hp, killable_reader):
    from agent.intake.item import ItemResult
    from agent.intake.worker import ForkedPool, WorkerDied

    _, policy = hp
    pool = ForkedPool(policy, 1)
    killer = _kill_when_parsing(killable_reader)
    try:
        got = pool.run([("a.mood.csv", mood_csv_bytes(policy)), ("k.mood.csv", SLOW),
                        ("b.mood.csv", mood_csv_bytes(policy))], None, 120.0)
    finally:
        killer.join(5)
        pool.close()
    assert [type(g) for g in got] == [ItemResult, WorkerDied, ItemResult]
    assert got[1].reason == "reader_crashed" and "SIGKILL" in got[1].detail
    assert pool.forks == 2   # restarted once, for the file after the dead one


def test_hung_worker_is_stopped_and_the_file_queued_behind_it_is_parsed_once(hp, killable_reader):
    """The job written ahead to the hung worker is sent again to the new one and answered exactly once."""
    from agent.intake.item import ItemResult
    from agent.intake.worker import ForkedPool, WorkerDied

    _, policy = hp
    pool = ForkedPool(policy, 1)
    try:
        got = pool.run([("a.mood.csv", mood_csv_bytes(policy)), ("h.mood.csv", HANG),
                        ("b.mood.csv", mood_csv_bytes(policy)), ("c.mood.csv", mood_csv_bytes(policy))], None, 1.0)
    finally:
        pool.close()
    assert [type(g) for g in got] == [ItemResult, WorkerDied, ItemResult, ItemResult]
    assert got[1].reason == "reader_timeout"
    assert pool.forks == 2


def test_pool_answers_in_job_order_like_the_library(hp):
    """Two workers, audio, accelerometry, mood and bad files: one answer per job, in order, equal to
    ``featurise()`` called in this process (the library itself is the reference)."""
    from agent.errors import RejectedInput
    from agent.intake import featurise
    from agent.intake.worker import ForkedPool

    _, policy = hp
    jobs = []
    for i in range(6):
        jobs.append((f"snd_{stamp(T0 + 60 * i)}.wav", wav_bytes(seed=i, freq=300.0 + 50 * i)))
        jobs.append((f"acc_{stamp(T0 + 60 * i)}.accel.csv", accel_bytes(T0 + 60 * i, seed=i)))
        jobs.append((f"m{i}.mood.csv", mood_csv_bytes(policy)))
        jobs.append((f"bad{i}.wav", b"RIFF-not-really"))
    pool = ForkedPool(policy, 2)
    try:
        halves = [jobs[0::2], jobs[1::2]]
        answers: list = [None, None]

        def run(k):
            answers[k] = pool.run(halves[k], None, 60.0)

        threads = [threading.Thread(target=run, args=(k,)) for k in (0, 1)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
    finally:
        pool.close()
    for half, got in zip(halves, answers, strict=True):
        assert len(got) == len(half)
        for (name, data), ans in zip(half, got, strict=True):
            try:
                want = featurise(name, data, policy)
            except RejectedInput as e:
                assert isinstance(ans, RejectedInput) and ans.reason == e.reason, name
                continue
            assert ans.kind == want.kind and ans.n_samples == want.n_samples, name
            assert sorted(ans.rows) == sorted(want.rows), name
    assert pool.forks == 2   # each worker started once for all its files


def test_agent_destroys_the_file_whose_worker_was_killed_on_time_with_a_reason(hp, killable_reader):
    """Through the agent's pipeline (Intake(isolate=True)): the killed worker's file is rejected
    reader_crashed, destroyed, and closed in the ledger inside the window; the others are featurised."""
    from agent.intake.drain import drain
    from agent.intake.pipeline import Intake
    from agent.ledger import Ledger

    h, policy = hp
    (h.inbox / f"snd_{stamp(T0)}.wav").write_bytes(wav_bytes())
    (h.inbox / f"snd_{stamp(T0 + 60)}.wav").write_bytes(SLOW)
    (h.inbox / f"m_{stamp(T0)}.mood.csv").write_bytes(mood_csv_bytes(policy))
    killer = _kill_when_parsing(killable_reader)
    with Intake(h, policy, isolate=True) as it:
        it.reader_timeout_s = 120.0
        rep = drain(h, policy, settle_s=0.0, intake=it)
    killer.join(5)
    assert rep.reasons == {"reader_crashed": 1}
    assert rep.featurised == {"audio": 1, "mood": 1}
    assert os.listdir(h.inbox) == []
    entries = list(Ledger(h).entries())
    crashed = [e["item"] for e in entries if e.get("reason") == "reader_crashed"]
    assert len(crashed) == 1
    destroyed = [e for e in entries if e["event"] == "destroyed" and e["item"] == crashed[0]]
    assert len(destroyed) == 1 and destroyed[0]["exposure_s"] <= policy.retention.raw_seconds


def test_worker_limits_blas_pools_to_one_thread():
    """What each worker calls at start: every BLAS/OpenMP pool threadpoolctl finds is set to one thread."""
    from threadpoolctl import threadpool_info

    from agent.intake.worker import _one_thread

    limits = _one_thread()
    try:
        assert all(p["num_threads"] == 1 for p in threadpool_info())
    finally:
        if limits is not None:
            limits.restore_original_limits()
