"""Finding 10: a file that kills the process.  Readers run in forked children whose death the agent survives.

The crashing and hanging readers are simulated by wrapping ``agent.intake.featurise`` in the parent before
the fork (the child inherits the wrapper): the child is a real process and really dies (SIGSEGV) or hangs,
as a native decoder crash or a pathological input would make it.
"""

from __future__ import annotations

import os
import signal
import time

import pytest

from intake_samples import T0, drop, make_home, mood_csv_bytes, our_files, stamp

CRASH = b"lethe-test: crash the reader\n"
HANG = b"lethe-test: hang the reader\n"


@pytest.fixture
def hp(tmp_path):
    h = make_home(tmp_path / "home")
    return h, h.load_policy()


@pytest.fixture
def hostile_reader(monkeypatch):
    import agent.intake as ai

    real = ai.featurise

    def featurise(path, data, policy, *, now=None):
        if data.startswith(CRASH):
            os.kill(os.getpid(), signal.SIGSEGV)
        if data.startswith(HANG):
            time.sleep(3600)
        return real(path, data, policy, now=now)

    monkeypatch.setattr(ai, "featurise", featurise)


def test_forked_reader_answers_like_the_library(hp):
    from agent.intake import featurise
    from agent.intake.worker import featurise_forked

    h, policy = hp
    data = mood_csv_bytes(policy)
    [got] = featurise_forked([("a.mood.csv", data)], policy, None, 30.0)
    ref = featurise("a.mood.csv", data, policy)
    assert got.rows == ref.rows and got.kind == ref.kind and got.n_samples == ref.n_samples


def test_forked_reader_passes_on_a_rejection(hp):
    from agent.errors import RejectedInput
    from agent.intake.worker import featurise_forked

    h, policy = hp
    [got] = featurise_forked([("a.mood.csv", b"time\nnot a time\n")], policy, None, 30.0)
    assert isinstance(got, RejectedInput) and got.reason not in ("reader_crashed", "reader_error")


def test_a_crash_takes_only_the_file_being_parsed(hp, hostile_reader):
    from agent.intake.item import ItemResult
    from agent.intake.worker import WorkerDied, featurise_forked

    h, policy = hp
    jobs = [("a.mood.csv", mood_csv_bytes(policy)), ("k.mood.csv", CRASH), ("b.mood.csv", mood_csv_bytes(policy))]
    got = featurise_forked(jobs, policy, None, 30.0)
    assert isinstance(got[0], ItemResult) and isinstance(got[2], ItemResult)   # before and after: parsed
    assert isinstance(got[1], WorkerDied) and got[1].reason == "reader_crashed"
    assert "SIGSEGV" in got[1].detail


def test_a_hanging_reader_is_stopped(hp, hostile_reader):
    from agent.intake.worker import WorkerDied, featurise_forked

    h, policy = hp
    [got] = featurise_forked([("h.mood.csv", HANG)], policy, None, 0.5)
    assert isinstance(got, WorkerDied) and got.reason == "reader_timeout"


def test_agent_survives_a_file_that_kills_its_reader(hp, hostile_reader):
    from agent.intake.watcher import run_agent

    h, policy = hp
    drop(h.inbox, "killer.mood.csv", CRASH + b"time,happy\n")
    for i in range(3):
        drop(h.inbox, f"ok{i}_{stamp(T0)}.mood.csv", mood_csv_bytes(policy, T0 + 7200 * i))
    rep = run_agent(h, policy, once=True, settle_s=0.0)
    assert rep.reasons == {"reader_crashed": 1}
    assert rep.total("featurised") == 3
    assert our_files(h.inbox) == []


def test_child_holds_no_descriptor_of_the_agent(hp, monkeypatch):
    """The child closes what it inherited (the agent lock, the inbox, the ledger) before parsing."""
    import agent.intake as ai
    from agent.intake.worker import featurise_forked

    h, policy = hp
    real = ai.featurise

    def featurise(path, data, policy, *, now=None):
        res = real(path, data, policy, now=now)
        res.warnings.append(f"fds={sorted(int(x) for x in os.listdir('/proc/self/fd'))}")
        return res

    monkeypatch.setattr(ai, "featurise", featurise)
    if not os.path.isdir("/proc/self/fd"):
        pytest.skip("needs /proc")
    held = os.open(h.inbox, os.O_RDONLY)   # as the agent holds the inbox
    try:
        [got] = featurise_forked([("a.mood.csv", mood_csv_bytes(policy))], policy, None, 30.0)
    finally:
        os.close(held)
    fds = eval(got.warnings[-1].split("=", 1)[1])  # noqa: S307 - our own list of ints
    assert held not in fds and all(fd <= 3 or fd == max(fds) for fd in fds)


def test_persistent_worker_survives_to_the_next_file_after_a_crash(hp, hostile_reader):
    from agent.intake.item import ItemResult
    from agent.intake.worker import ForkedPool, WorkerDied

    h, policy = hp
    pool = ForkedPool(policy, 1)
    try:
        got = pool.run([("a.mood.csv", mood_csv_bytes(policy)), ("k.mood.csv", CRASH),
                        ("b.mood.csv", mood_csv_bytes(policy)), ("c.mood.csv", mood_csv_bytes(policy))], None, 30.0)
        assert [type(g) for g in got] == [ItemResult, WorkerDied, ItemResult, ItemResult]
        assert got[1].reason == "reader_crashed" and "SIGSEGV" in got[1].detail
        assert pool.forks == 2          # one fork per life of the worker, not one per file
    finally:
        pool.close()


def test_persistent_worker_that_hangs_is_stopped(hp, hostile_reader):
    from agent.intake.worker import ForkedPool, WorkerDied

    h, policy = hp
    pool = ForkedPool(policy, 1)
    try:
        [got] = pool.run([("h.mood.csv", HANG)], None, 0.5)
        assert isinstance(got, WorkerDied) and got.reason == "reader_timeout"
    finally:
        pool.close()
