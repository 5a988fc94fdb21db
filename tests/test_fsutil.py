"""agent.fsutil: atomic private writes and the one advisory lock (flock(2) semantics, POSIX)."""

from __future__ import annotations

import os
import stat

import pytest

from agent.errors import StateError
from agent.fsutil import LockHeld, atomic_write, file_lock, is_locked, write_private


def test_write_private_creates_a_0600_file_with_the_content(tmp_path):
    p = tmp_path / "sub" / "f.json"
    write_private(p, b"abc")
    assert p.read_bytes() == b"abc"
    assert stat.S_IMODE(p.stat().st_mode) == 0o600
    assert stat.S_IMODE(p.parent.stat().st_mode) == 0o700


def test_atomic_write_replaces_and_leaves_no_temporary_file(tmp_path):
    p = tmp_path / "f"
    atomic_write(p, b"old")
    atomic_write(p, b"new", mode=0o644)
    assert p.read_bytes() == b"new"
    assert sorted(os.listdir(tmp_path)) == ["f"]


def test_atomic_write_refuses_text(tmp_path):
    with pytest.raises(TypeError, match="bytes"):
        atomic_write(tmp_path / "f", "text")


def test_failed_rename_removes_the_temporary_file(tmp_path):
    # rename(2) cannot replace a non-empty directory (EISDIR/ENOTEMPTY): the write
    # fails, the directory stays, and no temporary file is left behind.
    target = tmp_path / "d"
    target.mkdir()
    (target / "keep").write_bytes(b"x")
    with pytest.raises(OSError):
        atomic_write(target, b"new")
    assert sorted(os.listdir(tmp_path)) == ["d"]
    assert (target / "keep").read_bytes() == b"x"


def test_second_exclusive_lock_is_refused_naming_the_holder(tmp_path):
    # flock(2): locks belong to open file descriptions, so a second open in the
    # same process conflicts like another process would.
    lock = tmp_path / "state" / "x.lock"
    with file_lock(lock, note="pid 1 (agent)"):
        with pytest.raises(LockHeld, match=r"pid 1 \(agent\)") as e, file_lock(lock, blocking=False):
            pass
        assert isinstance(e.value, StateError)


def test_lock_is_released_after_the_block(tmp_path):
    lock = tmp_path / "x.lock"
    with file_lock(lock):
        assert is_locked(lock) is True
    assert is_locked(lock) is False
    with file_lock(lock, blocking=False):
        pass


def test_shared_locks_coexist(tmp_path):
    lock = tmp_path / "x.lock"
    with file_lock(lock, shared=True), file_lock(lock, shared=True, blocking=False):
        pass


def test_is_locked_on_a_missing_file_is_false(tmp_path):
    assert is_locked(tmp_path / "none.lock") is False
