"""File helpers shared by the device and the researcher side.

One job each: write a file atomically (temporary name in the same directory,
``fsync``, ``rename``, then ``fsync`` of the directory so the rename itself is
durable), make a descriptor or a directory durable, and hold an advisory
``flock(2)`` lock.  Every module that writes a private file or takes a lock
goes through these.

Temporary names start with a dot and carry the process and thread id, so two
writers never share one and the intake watcher (which ignores dot files) never
picks a half-written file up.
"""

from __future__ import annotations

import errno
import fcntl
import os
import threading
from collections.abc import Iterator
from contextlib import contextmanager, suppress
from pathlib import Path

from .errors import StateError

__all__ = ["DIR_MODE", "FILE_MODE", "LockHeld", "atomic_write", "file_lock", "fsync_dir", "fsync_fd",
           "is_locked", "lock_fd", "temp_name", "write_all", "write_private"]

DIR_MODE = 0o700
FILE_MODE = 0o600


class LockHeld(StateError):
    """A non-blocking lock request found the lock held by another process."""

    def __init__(self, path, holder: str = ""):
        self.path = str(path)
        self.holder = holder
        super().__init__(f"{self.path}: locked by another process" + (f" ({holder})" if holder else ""))


def temp_name(path: Path) -> Path:
    """A sibling name for a temporary file: hidden, unique per process and thread."""
    path = Path(path)
    return path.with_name(f".{path.name}.tmp{os.getpid()}.{threading.get_ident()}")


def write_all(fd: int, data: bytes) -> None:
    """``os.write`` until every byte is written (a short write is not an error)."""
    view = memoryview(data)
    while view:
        n = os.write(fd, view)
        view = view[n:]


def fsync_fd(fd: int) -> None:
    """Flush a file's data and metadata to stable storage (``fsync(2)``)."""
    os.fsync(fd)


def fsync_dir(path) -> None:
    """``fsync`` a directory so that creations, renames and unlinks in it are durable.

    Best effort: a directory that cannot be opened or a file system that cannot
    fsync a directory is skipped silently (the entries themselves are written).
    """
    try:
        fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def atomic_write(path, data: bytes, *, mode: int = FILE_MODE, durable: bool = True,
                 make_parents: bool = True) -> Path:
    """Replace ``path`` with ``data`` atomically: readers see the old or the new file, never a part.

    Parameters
    ----------
    path : path-like
        The destination; its directory is created (mode 0700) when missing and
        ``make_parents`` is true.
    data : bytes
        The whole new content.
    mode : int
        Permission bits of the new file (default 0600).
    durable : bool
        ``fsync`` the file before the rename and the directory after it.
        False only for files whose loss on power failure is harmless (demo data).
    make_parents : bool
        Create missing parent directories.

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise TypeError(f"atomic_write: data must be bytes, got {type(data).__name__}")
    path = Path(path)
    if make_parents:
        path.parent.mkdir(parents=True, exist_ok=True, mode=DIR_MODE)
    tmp = temp_name(path)
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_NOFOLLOW, mode)
    try:
        try:
            write_all(fd, bytes(data))
            if durable:
                os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
    except BaseException:
        with suppress(OSError):
            os.unlink(tmp)
        raise
    if durable:
        fsync_dir(path.parent)
    return path


def write_private(path, data: bytes) -> None:
    """Write ``data`` atomically and durably to ``path`` with mode 0600."""
    atomic_write(path, data, mode=FILE_MODE, durable=True)


def lock_fd(fd: int, *, shared: bool = False, blocking: bool = True) -> bool:
    """Take an advisory ``flock(2)`` lock on an open descriptor.

    Returns True when the lock is held; False only when ``blocking`` is false
    and another process holds a conflicting lock.  The lock is released when
    the descriptor is closed.
    """
    op = fcntl.LOCK_SH if shared else fcntl.LOCK_EX
    if not blocking:
        op |= fcntl.LOCK_NB
    try:
        fcntl.flock(fd, op)
    except OSError as e:
        if not blocking and e.errno in (errno.EWOULDBLOCK, errno.EACCES):
            return False
        raise
    return True


@contextmanager
def file_lock(path, *, shared: bool = False, blocking: bool = True, note: str | None = None) -> Iterator[int]:
    """Hold an advisory lock on the file ``path`` (created 0600 if missing) for the ``with`` block.

    Parameters
    ----------
    path : path-like
        The lock file; its directory is created (0700) when missing.
    shared : bool
        A shared (reader) lock instead of an exclusive one.
    blocking : bool
        Wait for the lock; when false a held lock raises :class:`LockHeld`
        naming the file and whatever the holder wrote into it.
    note : str, optional
        Written into the lock file once the lock is held (who holds it), so
        that :class:`LockHeld` can tell the next process.

    Yields
    ------
    int
        The locked descriptor.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True, mode=DIR_MODE)
    fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW, FILE_MODE)
    try:
        if not lock_fd(fd, shared=shared, blocking=blocking):
            try:
                holder = os.pread(fd, 200, 0).decode(errors="replace").strip()
            except OSError:
                holder = ""
            raise LockHeld(path, holder)
        if note is not None:
            os.ftruncate(fd, 0)
            os.pwrite(fd, note.encode("utf-8", "replace"), 0)
        yield fd
    finally:
        os.close(fd)  # closing releases the flock


def is_locked(path) -> bool | None:
    """Whether another process holds an exclusive lock on ``path`` (None when it cannot be told)."""
    path = Path(path)
    if not path.exists():
        return False
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW)
    except OSError:
        return None
    try:
        return not lock_fd(fd, shared=True, blocking=False)
    except OSError:
        return None
    finally:
        os.close(fd)
