"""Safe access to inbox entries: look, open, read and destroy without being redirected.

Every operation here works on a *name inside the inbox* relative to a directory
file descriptor held for the inbox, never on a path string that the file system
could resolve somewhere else.  The rules (see ``docs/intake.md``, "Safety"):

* an entry is examined with ``lstat`` (a symlink is seen as a symlink);
* a regular file is opened with ``O_NOFOLLOW | O_NONBLOCK | O_NOCTTY`` and the
  open descriptor is checked with ``fstat``: still a regular file, one link,
  the same device and inode that ``lstat`` saw, within the size cap;
* a FIFO, socket or device node is never opened (opening a FIFO for reading
  would block; opening a device can have side effects);
* a symlink is never followed: the link itself (a name in our inbox) is
  removed, its target is never opened nor touched;
* a hardlinked file (``st_nlink > 1``) is never read nor overwritten, since the
  bytes belong to another name as well: only our name is unlinked, so the
  other name's data survives unchanged;
* a directory is never descended into nor removed: it is reported;
* destruction overwrites through the descriptor we hold (not by path), then
  unlinks by name relative to the inbox descriptor after re-checking that the
  name still refers to the same device and inode, then fsyncs the directory.
"""

from __future__ import annotations

import errno
import os
import stat
from contextlib import contextmanager
from dataclasses import dataclass

from ..destroy import destroy_entry, destroy_opened, entry_kind, open_subdir, overwrite_fd
from ..errors import RejectedInput, StateError

# Reason codes for entries refused before any byte is read.  They extend the
# readers' codes (docs/inbox-formats.md) and are stable: the ledger and the
# intake report carry them.
UNSAFE_REASONS = {
    "symlink": "a symbolic link; never followed, the link itself is removed",
    "hardlink": "a file with more than one hard link; not read, only the inbox name is removed",
    "fifo": "a named pipe; never opened, the name is removed",
    "socket": "a socket; never opened, the name is removed",
    "device": "a device node; never opened, the name is removed",
    "too_large": "larger than intake.max_file_bytes; not read, destroyed",
    "changed": "the entry changed between lstat and open; it is looked at again",
    "unreadable": "the file could not be opened or read",
}

_OPEN_FLAGS = os.O_NOFOLLOW | os.O_NONBLOCK | getattr(os, "O_NOCTTY", 0) | getattr(os, "O_CLOEXEC", 0)
_CHUNK = 1 << 20


class UnsafeEntry(RejectedInput):
    """An inbox entry refused for what it *is* (link, pipe, device, size), not its content."""




def same_file(a: os.stat_result, b: os.stat_result, *, strict: bool = False) -> bool:
    """Same device and inode; ``strict`` also requires the same ctime.

    An inode number is reused as soon as a file is unlinked and nothing holds
    it open, so a name re-created in between looks "the same" by (dev, ino)
    alone; its ctime (set by the kernel, not by ``utime``) tells them apart.
    While we hold a descriptor the inode cannot be reused, so (dev, ino) is
    enough to recognise the file we opened.
    """
    if (a.st_dev, a.st_ino) != (b.st_dev, b.st_ino):
        return False
    return not strict or a.st_ctime_ns == b.st_ctime_ns


@dataclass
class OpenedFile:
    """A regular inbox file opened safely; ``fd`` stays open until :meth:`InboxDir.destroy`."""

    name: str
    fd: int
    st: os.stat_result   # fstat of the open descriptor
    writable: bool       # False when the file could only be opened read-only
    overwritten: int = 0  # zero bytes written over its data by destruction

    def close(self) -> None:
        if self.fd >= 0:
            try:
                os.close(self.fd)
            finally:
                self.fd = -1


class InboxDir:
    """The inbox, held open as a directory descriptor.

    Parameters
    ----------
    path : path-like
        ``HOME/inbox``.  It must be a real directory, not a symlink to one.
    max_file_bytes : int
        ``policy.intake.max_file_bytes``; larger files are not read.
    """

    def __init__(self, path, max_file_bytes: int):
        if int(max_file_bytes) < 1:
            raise ValueError(f"max_file_bytes must be a positive integer, got {max_file_bytes!r}")
        self.path = os.fspath(path)
        self.max_file_bytes = int(max_file_bytes)
        try:
            st = os.lstat(self.path)
        except FileNotFoundError:
            raise StateError(f"{self.path}: the inbox does not exist; run 'lethe init' first") from None
        if not stat.S_ISDIR(st.st_mode):
            raise StateError(f"{self.path}: the inbox must be a real directory, "
                             f"found a {entry_kind(st)}; refusing to follow it")
        self.fd = os.open(self.path, os.O_RDONLY | os.O_DIRECTORY | os.O_NOFOLLOW | os.O_CLOEXEC)
        self.st = os.fstat(self.fd)

    # -- context manager ---------------------------------------------------
    def close(self) -> None:
        if self.fd >= 0:
            os.close(self.fd)
            self.fd = -1

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # -- looking -------------------------------------------------------------
    def display(self, name: str) -> str:
        """The entry's path for participant-facing messages (``repr`` escapes newlines)."""
        shown = os.path.join(self.path, name)
        return shown if shown.isprintable() else repr(shown)

    def names(self) -> list[str]:
        """Names directly in the inbox (no descent), including ignored ones."""
        return os.listdir(self.fd)

    def lstat(self, name: str) -> os.stat_result | None:
        """``lstat`` of ``name`` in the inbox, or ``None`` if it (or a folder on its way) no longer exists.

        ``name`` may lie in a subfolder (``"2026-11-04/snd.wav"``): every folder on
        the way is opened ``O_NOFOLLOW | O_DIRECTORY`` from the inbox descriptor,
        so a folder swapped for a link is never followed.
        """
        with self.parent(name) as (dfd, base):
            if dfd is None:
                return None
            try:
                return os.stat(base, dir_fd=dfd, follow_symlinks=False)
            except FileNotFoundError:
                return None

    @contextmanager
    def parent(self, name: str):
        """``(descriptor of the folder holding name, its last component)``; ``(None, base)`` if a folder is gone."""
        parts = _check_name(name)
        if len(parts) == 1:
            yield self.fd, parts[0]
            return
        fds: list[int] = []
        try:
            cur = self.fd
            for part in parts[:-1]:
                try:
                    cur = open_subdir(cur, part)
                except OSError as e:
                    if e.errno in (errno.ENOENT, errno.ELOOP, errno.ENOTDIR, errno.ESTALE):
                        cur = -1
                        break
                    raise
                fds.append(cur)
                if os.fstat(cur).st_dev != self.st.st_dev:
                    cur = -1   # another file system mounted inside the inbox: never entered
                    break
            yield (None if cur == -1 else cur), parts[-1]
        finally:
            for fd in fds:
                os.close(fd)

    def refusal(self, name: str, st: os.stat_result) -> UnsafeEntry | None:
        """Why ``name`` must not be read, judged from its ``lstat``; ``None`` if it may be."""
        t = entry_kind(st)
        shown = self.display(name)
        if t in ("symlink", "fifo", "socket", "device"):
            return UnsafeEntry(shown, t, UNSAFE_REASONS[t])
        if t == "dir":
            return UnsafeEntry(shown, "directory", "a subdirectory; lethe never descends into nor removes it")
        if st.st_nlink > 1:
            return UnsafeEntry(shown, "hardlink", f"{st.st_nlink} hard links; {UNSAFE_REASONS['hardlink']}")
        if st.st_size > self.max_file_bytes:
            return UnsafeEntry(shown, "too_large",
                               f"{st.st_size} bytes exceeds intake.max_file_bytes = {self.max_file_bytes}")
        return None

    # -- opening and reading ---------------------------------------------------
    def open(self, name: str, lst: os.stat_result, *, check_size: bool = True) -> OpenedFile:
        """Open a regular file that ``lstat`` saw as ``lst``; checks the descriptor with ``fstat``.

        Raises
        ------
        UnsafeEntry
            ``changed`` if the name now refers to something else (a swap
            between ``lstat`` and ``open``), ``symlink`` if it became one,
            ``hardlink`` or ``too_large`` as seen on the open descriptor,
            ``unreadable`` on a permission or I/O error.
        """
        shown = self.display(name)
        if not stat.S_ISREG(lst.st_mode):
            raise UnsafeEntry(shown, entry_kind(lst) if entry_kind(lst) != "dir" else "directory",
                              "not a regular file")
        with self.parent(name) as (dfd, base):
            if dfd is None:
                raise UnsafeEntry(shown, "changed", "a folder on its way vanished or became a link")
            return self._open_in(dfd, base, name, lst, shown, check_size)

    def _open_in(self, dfd: int, base: str, name: str, lst, shown: str, check_size: bool) -> OpenedFile:
        writable = True
        try:
            # Read-write so destruction can overwrite through this very descriptor.
            fd = os.open(base, os.O_RDWR | _OPEN_FLAGS, dir_fd=dfd)
        except OSError as e:
            if e.errno == errno.ELOOP:
                raise UnsafeEntry(shown, "symlink", "became a symbolic link; not followed") from None
            if e.errno == errno.ENOENT:
                raise UnsafeEntry(shown, "changed", "vanished before it could be opened") from None
            if e.errno not in (errno.EACCES, errno.EPERM, errno.EROFS, errno.ETXTBSY):
                raise UnsafeEntry(shown, "unreadable", f"cannot open: {e.strerror}") from None
            writable = False
            try:
                fd = os.open(base, os.O_RDONLY | _OPEN_FLAGS, dir_fd=dfd)
            except OSError as e2:
                raise UnsafeEntry(shown, "unreadable", f"cannot open: {e2.strerror}") from None
        opened = OpenedFile(name, fd, os.fstat(fd), writable)
        problem = None
        fst = opened.st
        if not stat.S_ISREG(fst.st_mode):
            problem = UnsafeEntry(shown, "changed", f"became a {entry_kind(fst)} before it was opened")
        elif not same_file(fst, lst, strict=True):
            problem = UnsafeEntry(shown, "changed", "was replaced between lstat and open")
        elif fst.st_nlink != 1:
            problem = UnsafeEntry(shown, "hardlink", f"{fst.st_nlink} hard links on the open file; "
                                                     f"{UNSAFE_REASONS['hardlink']}")
        elif check_size and fst.st_size > self.max_file_bytes:
            problem = UnsafeEntry(shown, "too_large",
                                  f"{fst.st_size} bytes exceeds intake.max_file_bytes = {self.max_file_bytes}")
        if problem is not None:
            opened.close()
            raise problem
        return opened

    def read(self, opened: OpenedFile) -> bytes:
        """All bytes of an opened file, read from its descriptor, never more than the cap."""
        chunks, total = [], 0
        offset = 0
        while True:
            try:
                b = os.pread(opened.fd, _CHUNK, offset)
            except OSError as e:
                raise UnsafeEntry(self.display(opened.name), "unreadable", f"read failed: {e.strerror}") from None
            if not b:
                break
            chunks.append(b)
            offset += len(b)
            total += len(b)
            if total > self.max_file_bytes:
                raise UnsafeEntry(self.display(opened.name), "too_large",
                                  f"grew past intake.max_file_bytes = {self.max_file_bytes} while being read")
        return b"".join(chunks)

    # -- destroying ----------------------------------------------------------
    def destroy(self, name: str, opened: OpenedFile | None = None,
                expect: os.stat_result | None = None, *, deadline: float | None = None) -> bool:
        """Destroy an inbox entry through :mod:`agent.destroy`, then fsync its folder.

        Parameters
        ----------
        name : str
            The entry's name relative to the inbox (may lie in a subfolder).
        opened : OpenedFile, optional
            The descriptor the file was read through; the data it holds are
            overwritten (bounded: allocated blocks, at most ``max_file_bytes``)
            when it is a single-link file opened for writing.  Closed afterwards.
        expect : os.stat_result, optional
            For an entry that was never opened: the ``lstat`` it must still match.

        Returns
        -------
        bool
            True if the entry no longer exists under its name (unlinked, or
            already gone); False if the name still refers to it.
        """
        try:
            gone = self.unlink_checked(name, opened, expect, overwrite=True, deadline=deadline)
            self.fsync(name)
            return gone
        finally:
            if opened is not None:
                opened.close()

    def overwrite(self, opened: OpenedFile, deadline: float | None = None) -> int:
        """Zeros over the file's data through its descriptor, fsync'd; returns bytes written.

        Bounded by the allocated blocks and ``max_file_bytes`` (see
        :func:`agent.destroy.overwrite_fd`); skipped when the descriptor is
        read-only or the inode has gained another link.
        """
        if opened is None or opened.fd < 0 or not opened.writable:
            return 0
        n, why = overwrite_fd(opened.fd, self.max_file_bytes, deadline=deadline)
        opened.overwritten = n
        return n

    def unlink_checked(self, name: str, opened: OpenedFile | None = None,
                       expect: os.stat_result | None = None, *, overwrite: bool = False,
                       deadline: float | None = None) -> bool:
        """Unlink ``name`` only if it still is the file we hold (or, unopened, the one ``lstat`` saw).

        Returns True when the entry is gone from its name (see :class:`agent.destroy.Destroyed`).
        The folder is not fsynced here (see :meth:`fsync`), so a group of
        unlinks shares one directory fsync.
        """
        if opened is None and expect is None:
            raise ValueError("unlink_checked() needs the file's identity: pass opened= or expect=")
        with self.parent(name) as (dfd, base):
            if dfd is None:
                return True  # a folder on its way is gone or became a link: the entry is not there any more
            if opened is not None and opened.fd >= 0:
                d = destroy_opened(dfd, base, opened.fd, max_bytes=self.max_file_bytes, deadline=deadline,
                                   overwrite=overwrite and opened.writable)
                opened.overwritten = max(opened.overwritten, d.overwritten_bytes)
            else:
                d = destroy_entry(dfd, base, max_bytes=self.max_file_bytes, expect=expect, deadline=deadline)
            return d.gone

    def fsync(self, name: str | None = None) -> None:
        """fsync the inbox, or the folder holding ``name``."""
        try:
            if name is None or "/" not in name:
                os.fsync(self.fd)
                return
            with self.parent(name) as (dfd, _):
                if dfd is not None:
                    os.fsync(dfd)
        except OSError:
            pass  # some file systems cannot fsync a directory; the unlink still happened


def _check_name(name: str) -> list[str]:
    """Split an inbox-relative name into plain components (no empty, ``.`` or ``..`` part, no NUL)."""
    parts = name.split("/") if isinstance(name, str) else []
    if not parts or any(not p or p in (".", "..") or "\0" in p for p in parts):
        raise ValueError(f"{name!r} is not a plain file name inside the inbox")
    return parts
