"""The one safe way to destroy: every deletion lethe makes (intake, withdrawal, pruning) goes through here.

The destruction contract (``docs/intake.md``, "Destruction"):

* **No path is ever resolved.**  Every operation names one entry relative to a
  directory file descriptor.  Directories are opened
  ``O_RDONLY | O_DIRECTORY | O_NOFOLLOW`` relative to their parent's
  descriptor, and the opened descriptor is checked with ``fstat`` against the
  ``lstat`` of the name (same device and inode), so a directory swapped for a
  symbolic link between the listing and the descent is never entered: the
  link itself is removed and its target is never touched.
* **Look before writing.**  A regular file is opened ``O_RDWR | O_NOFOLLOW |
  O_NONBLOCK | O_NOCTTY`` and checked with ``fstat``: still a regular file, one
  link, the same device and inode the ``lstat`` saw.  Anything else (a symlink,
  a FIFO, a socket, a device node, a hard-linked file) is never opened for
  writing: only its name is unlinked.
* **Bounded overwrite.**  Zeros are written only over the file's *data
  extents* (``SEEK_DATA`` / ``SEEK_HOLE``), never over holes, and never more
  than the blocks actually allocated (``st_blocks * 512``) nor more than
  ``max_bytes``; a file whose allocated data exceed ``max_bytes`` is simply
  unlinked.  A sparse file of 1 TB apparent size therefore costs what its few
  allocated blocks cost.  An optional deadline stops the overwrite early (the
  name is unlinked all the same), so each file takes bounded time.
* **Unlink only what was checked.**  The name is unlinked only while it still
  refers to the inode that was overwritten (or, for an entry never opened, the
  device, inode and file type its ``lstat`` showed).  A directory is removed
  with ``rmdir`` relative to its parent's descriptor once emptied.  Nothing on
  another file system (a mount point) is entered.
* **Best effort, stated plainly.**  Overwriting is not guaranteed erasure on
  SSDs, journaling or copy-on-write file systems, snapshots, backups or sync
  folders (NIST SP 800-88 treats a logical overwrite as *clear* at best).

Terminology
-----------
entry
    One name in a directory (file, link, pipe, socket, device, directory).
data extent
    A byte range of a file that has blocks allocated (``lseek(SEEK_DATA)``).
"""

from __future__ import annotations

import contextlib
import errno
import os
import stat
import time
from dataclasses import dataclass, field

__all__ = ["DIR_FLAGS", "FILE_FLAGS", "Destroyed", "TreeReport", "check_name", "destroy_entry",
           "destroy_opened", "destroy_path", "destroy_tree", "open_dir", "open_subdir", "overwrite_fd",
           "same_entry"]

DIR_FLAGS = os.O_RDONLY | os.O_DIRECTORY | os.O_NOFOLLOW | getattr(os, "O_CLOEXEC", 0)
FILE_FLAGS = os.O_NOFOLLOW | os.O_NONBLOCK | getattr(os, "O_NOCTTY", 0) | getattr(os, "O_CLOEXEC", 0)
_CHUNK = 1 << 20
_ZEROS = b"\0" * _CHUNK
MAX_DEPTH = 64            # directory levels destroy_tree descends at most
_RETRIES = 8              # an entry that keeps changing under us is looked at this often, then left


@dataclass
class Destroyed:
    """What :func:`destroy_entry` did to one entry.

    Attributes
    ----------
    gone : bool
        The entry we examined is no longer reachable under its name: unlinked
        by us, or already gone.  False when the name still refers to it (it
        could not be removed) -- never record such an entry as destroyed.
    unlinked : bool
        We unlinked the name ourselves.
    overwritten_bytes : int
        Zero bytes written over the file's data before the unlink.
    skipped : str or None
        Why the data were not overwritten: ``not_regular``, ``hardlink``,
        ``read_only``, ``too_large``, ``deadline``, ``failed`` or ``None``.
    kind : str
        ``file``, ``dir``, ``symlink``, ``fifo``, ``socket``, ``device`` or ``missing``.
    """

    gone: bool
    unlinked: bool = False
    overwritten_bytes: int = 0
    skipped: str | None = None
    kind: str = "missing"


@dataclass
class TreeReport:
    """Counts from :func:`destroy_tree`; names are never kept (they may be personal)."""

    files: int = 0
    others: int = 0           # links, pipes, sockets, devices: unlinked, never opened
    dirs: int = 0
    overwritten_bytes: int = 0
    left: int = 0             # entries that could not be removed (changing, another file system, too deep)
    kept: int = 0
    skipped: dict = field(default_factory=dict)   # reason -> count of files unlinked without overwrite


def check_name(name: str) -> None:
    """Refuse anything but one plain name (no separator, not ``.``/``..``, no NUL)."""
    if not isinstance(name, str) or not name or "/" in name or name in (".", "..") or "\0" in name:
        raise ValueError(f"{name!r} is not a plain entry name inside a directory")


def entry_kind(st: os.stat_result) -> str:
    """``'file'``, ``'dir'``, ``'symlink'``, ``'fifo'``, ``'socket'`` or ``'device'``."""
    m = st.st_mode
    if stat.S_ISREG(m):
        return "file"
    if stat.S_ISDIR(m):
        return "dir"
    if stat.S_ISLNK(m):
        return "symlink"
    if stat.S_ISFIFO(m):
        return "fifo"
    if stat.S_ISSOCK(m):
        return "socket"
    return "device"


def same_entry(a: os.stat_result, b: os.stat_result) -> bool:
    """Same device, inode and file type.

    For an entry we never opened this is the identity used before unlinking.
    ctime is deliberately not part of it: a hard link made or a ``chmod`` done
    while we work changes ctime, and the entry must still be removed (it used
    to be "recorded as destroyed but left").  An inode number reused by a new
    entry of the same type within the window is harmless for what we unlink
    unread (links, pipes, sockets, devices hold no data of ours).
    """
    return (a.st_dev, a.st_ino, stat.S_IFMT(a.st_mode)) == (b.st_dev, b.st_ino, stat.S_IFMT(b.st_mode))


def open_dir(path) -> int:
    """Open a directory by path; the last component must not be a symbolic link."""
    return os.open(os.fspath(path), DIR_FLAGS)


def open_subdir(dir_fd: int, name: str, expect: os.stat_result | None = None) -> int:
    """Open ``name`` under ``dir_fd`` as a directory without following a link; check it with ``fstat``.

    Raises
    ------
    OSError
        ``ELOOP`` / ``ENOTDIR`` when the name is (now) a link or not a
        directory, ``ESTALE`` when it is another directory than ``expect``.
    """
    check_name(name)
    fd = os.open(name, DIR_FLAGS, dir_fd=dir_fd)
    if expect is not None:
        st = os.fstat(fd)
        if (st.st_dev, st.st_ino) != (expect.st_dev, expect.st_ino):
            os.close(fd)
            raise OSError(errno.ESTALE, "directory changed between lstat and open", name)
    return fd


def _lstat(dir_fd: int, name: str) -> os.stat_result | None:
    try:
        return os.stat(name, dir_fd=dir_fd, follow_symlinks=False)
    except FileNotFoundError:
        return None


def _extents(fd: int, size: int):
    """Yield ``(start, end)`` data extents of an open file (all of it if holes cannot be asked for)."""
    seek_data = getattr(os, "SEEK_DATA", None)
    seek_hole = getattr(os, "SEEK_HOLE", None)
    if seek_data is None or seek_hole is None:
        yield 0, size
        return
    off = 0
    while off < size:
        try:
            start = os.lseek(fd, off, seek_data)
        except OSError as e:
            if e.errno == errno.ENXIO:
                return                      # no data after off
            if e.errno in (errno.EINVAL, errno.EOPNOTSUPP):
                yield off, size             # the file system cannot tell holes: treat all as data
                return
            raise
        try:
            end = os.lseek(fd, start, seek_hole)
        except OSError:
            end = size
        end = min(end, size)
        if end <= start:
            return
        yield start, end
        off = end


def overwrite_fd(fd: int, max_bytes: int, *, deadline: float | None = None) -> tuple[int, str | None]:
    """Zeros over the data extents of an open regular file, then ``fsync``; bounded.

    Parameters
    ----------
    fd : int
        A descriptor opened for writing.
    max_bytes : int
        Never write more than this; a file whose allocated data exceed it is
        not overwritten at all (``too_large``).
    deadline : float, optional
        ``time.monotonic()`` value after which writing stops (``deadline``).

    Returns
    -------
    (int, str or None)
        Bytes written and, if the overwrite was skipped or cut short, why.
    """
    if int(max_bytes) < 0:
        raise ValueError(f"max_bytes must be >= 0, got {max_bytes!r}")
    st = os.fstat(fd)
    if not stat.S_ISREG(st.st_mode):
        return 0, "not_regular"
    if st.st_nlink != 1:
        return 0, "hardlink"
    if st.st_size == 0:
        return 0, None
    allocated = int(st.st_blocks) * 512 if hasattr(st, "st_blocks") else st.st_size
    budget = min(st.st_size, allocated)
    if budget > max_bytes:
        return 0, "too_large"
    written, why = 0, None
    try:
        for start, end in _extents(fd, st.st_size):
            off = start
            while off < end and written < budget:
                if deadline is not None and time.monotonic() > deadline:
                    why = "deadline"
                    break
                n = os.pwrite(fd, _ZEROS[: min(end - off, _CHUNK, budget - written)], off)
                if n <= 0:
                    return written, "failed"
                off += n
                written += n
            if why or written >= budget:
                break
        os.fsync(fd)   # dirty pages of an inode unlinked next may otherwise never reach the disk
    except OSError:
        return written, "failed"
    return written, why


def destroy_opened(dir_fd: int, name: str, fd: int, *, max_bytes: int,
                   deadline: float | None = None, overwrite: bool = True) -> Destroyed:
    """Overwrite through ``fd`` (opened and checked by the caller), then unlink ``name`` if it is still that file.

    The descriptor is not closed (the caller owns it).  ``overwrite=False``
    only unlinks (a descriptor opened read-only).
    """
    check_name(name)
    held = os.fstat(fd)
    written, why = 0, None
    if overwrite:
        written, why = overwrite_fd(fd, max_bytes, deadline=deadline)
    else:
        why = "read_only"
    now = _lstat(dir_fd, name)
    if now is None:
        return Destroyed(gone=True, overwritten_bytes=written, skipped=why, kind="file")
    if (now.st_dev, now.st_ino) != (held.st_dev, held.st_ino) or stat.S_ISDIR(now.st_mode):
        # The name now refers to something else: our inode left this name (renamed by someone).
        return Destroyed(gone=True, overwritten_bytes=written, skipped=why, kind="file")
    try:
        os.unlink(name, dir_fd=dir_fd)
    except FileNotFoundError:
        return Destroyed(gone=True, overwritten_bytes=written, skipped=why, kind="file")
    return Destroyed(gone=True, unlinked=True, overwritten_bytes=written, skipped=why, kind="file")


def destroy_entry(dir_fd: int, name: str, *, max_bytes: int, expect: os.stat_result | None = None,
                  deadline: float | None = None) -> Destroyed:
    """Destroy one non-directory entry under ``dir_fd`` (see the module docstring).

    Parameters
    ----------
    dir_fd : int
        Descriptor of the directory holding ``name``.
    name : str
        One plain name.
    max_bytes : int
        Overwrite bound (``intake.max_file_bytes`` for the inbox).
    expect : os.stat_result, optional
        The ``lstat`` the caller saw; the entry is left alone (``gone`` False)
        if the name now refers to something else of the same name but another
        identity, so a new arrival is never destroyed unseen.
    deadline : float, optional
        ``time.monotonic()`` bound on the overwrite.
    """
    check_name(name)
    for _ in range(_RETRIES):
        lst = _lstat(dir_fd, name)
        if lst is None:
            return Destroyed(gone=True)
        if expect is not None and not _is_expected(lst, expect):
            return Destroyed(gone=True, kind="missing")  # ours is gone; this is someone else's new entry
        kind = entry_kind(lst)
        if kind == "dir":
            return Destroyed(gone=False, kind="dir", skipped="not_regular")
        if kind == "file" and lst.st_nlink == 1:
            try:
                fd = os.open(name, os.O_RDWR | FILE_FLAGS, dir_fd=dir_fd)
            except OSError as e:
                if e.errno in (errno.ENOENT, errno.ELOOP, errno.ENXIO):
                    continue                          # changed under us: look again
                if e.errno in (errno.EACCES, errno.EPERM, errno.EROFS, errno.ETXTBSY):
                    fd = None                         # cannot write: only unlink
                else:
                    raise
            if fd is not None:
                try:
                    st = os.fstat(fd)
                    if not same_entry(st, lst):
                        continue                      # swapped between lstat and open
                    d = destroy_opened(dir_fd, name, fd, max_bytes=max_bytes, deadline=deadline)
                    d.kind = "file"
                    return d
                finally:
                    os.close(fd)
        # Never opened: links, pipes, sockets, devices, hard-linked or unwritable files.
        now = _lstat(dir_fd, name)
        if now is None:
            return Destroyed(gone=True, kind=kind)
        if not same_entry(now, lst):
            continue
        try:
            os.unlink(name, dir_fd=dir_fd)
        except FileNotFoundError:
            return Destroyed(gone=True, kind=kind)
        except IsADirectoryError:
            continue
        why = {"file": "hardlink" if lst.st_nlink > 1 else "read_only"}.get(kind, "not_regular")
        return Destroyed(gone=True, unlinked=True, skipped=why, kind=kind)
    lst = _lstat(dir_fd, name)
    return Destroyed(gone=lst is None or (expect is not None and not _is_expected(lst, expect)))


def _is_expected(now: os.stat_result, expect: os.stat_result) -> bool:
    """``same_entry``, and for a single-link regular file also the same ctime.

    An unlinked inode number is reused at once, so a new arrival under the old
    name can look "the same" by device and inode; a single-link file's ctime
    tells them apart.  Links, pipes, devices and hard-linked files are judged
    without ctime (see :func:`same_entry`).
    """
    if not same_entry(now, expect):
        return False
    if stat.S_ISREG(now.st_mode) and now.st_nlink == 1 and expect.st_nlink == 1:
        return now.st_ctime_ns == expect.st_ctime_ns
    return True


def destroy_path(path, *, max_bytes: int, deadline: float | None = None) -> Destroyed:
    """:func:`destroy_entry` for ``path``: its parent is opened without following a final link."""
    parent, name = os.path.split(os.path.abspath(os.fspath(path)))
    dfd = open_dir(parent)
    try:
        return destroy_entry(dfd, name, max_bytes=max_bytes, deadline=deadline)
    finally:
        os.close(dfd)


def destroy_tree(dir_fd: int, *, max_bytes: int, keep=(), remove_dirs: bool = True,
                 deadline: float | None = None, _depth: int = 0, _report: TreeReport | None = None) -> TreeReport:
    """Destroy everything under an open directory (not the directory itself).

    Subdirectories are entered through :func:`open_subdir` (never through a
    link), only on the same file system, at most :data:`MAX_DEPTH` deep, and
    removed once empty (``remove_dirs``).

    Parameters
    ----------
    dir_fd : int
        The directory, opened with :func:`open_dir`.
    max_bytes : int
        Overwrite bound per file.
    keep : iterable of str
        Names *directly* under ``dir_fd`` to leave in place.
    deadline : float, optional
        ``time.monotonic()`` bound on each overwrite.
    """
    rep = _report if _report is not None else TreeReport()
    keep = set(keep)
    top = os.fstat(dir_fd)
    for _ in range(_RETRIES):
        names = [n for n in os.listdir(dir_fd) if n not in keep]
        if not names:
            break
        progress = [_destroy_one(dir_fd, n, top, rep, max_bytes, remove_dirs, deadline, _depth) for n in names]
        if not any(progress):
            break
    if _depth == 0:
        with contextlib.suppress(OSError):
            os.fsync(dir_fd)
        present = os.listdir(dir_fd)
        rep.kept = sum(1 for n in present if n in keep)
        rep.left = len(present) - rep.kept
    return rep


def _destroy_one(dir_fd, name, top, rep, max_bytes, remove_dirs, deadline, depth) -> bool:
    lst = _lstat(dir_fd, name)
    if lst is None:
        return True
    if not stat.S_ISDIR(lst.st_mode):
        d = destroy_entry(dir_fd, name, max_bytes=max_bytes, expect=lst, deadline=deadline)
        if d.unlinked:
            if d.kind == "file":
                rep.files += 1
            else:
                rep.others += 1
            rep.overwritten_bytes += d.overwritten_bytes
            if d.skipped:
                rep.skipped[d.skipped] = rep.skipped.get(d.skipped, 0) + 1
        return d.gone
    if lst.st_dev != top.st_dev or depth + 1 >= MAX_DEPTH:
        return False          # a mount point or too deep: never entered
    try:
        sub = open_subdir(dir_fd, name, expect=lst)
    except OSError as e:
        if e.errno in (errno.ENOENT, errno.ELOOP, errno.ENOTDIR, errno.ESTALE):
            return True       # changed under us (e.g. swapped for a link): the next pass looks again
        raise
    try:
        destroy_tree(sub, max_bytes=max_bytes, remove_dirs=remove_dirs, deadline=deadline, _depth=depth + 1,
                     _report=rep)
        if remove_dirs and not os.listdir(sub):
            now = _lstat(dir_fd, name)
            if now is not None and (now.st_dev, now.st_ino) == (lst.st_dev, lst.st_ino):
                try:
                    os.rmdir(name, dir_fd=dir_fd)
                    rep.dirs += 1
                except OSError:
                    return False
        with contextlib.suppress(OSError):
            os.fsync(sub)
    finally:
        os.close(sub)
    return True
