"""A safe walk of the inbox, subfolders included, and which entries are ready to be taken.

Terminology
-----------
name
    An entry's path relative to the inbox, ``/``-separated (``"2026-11-04/snd.wav"``);
    every component is a plain name.  Folders on the way are always opened
    ``O_NOFOLLOW | O_DIRECTORY`` from the inbox descriptor (:mod:`agent.destroy`),
    so a folder swapped for a link is never followed.
unfinished
    A name a writer has not finished: ending ``.part`` or with a component
    starting with ``.`` (hidden files and folders of sync tools).  Not taken
    while a writer may still finish it; destroyed *unread* once it is older
    than ``retention.raw_seconds`` (reason ``partial`` or ``hidden``).
leftover
    ``.lethe-destroying-*``: a file whose destruction a killed agent had begun
    (renamed before its overwrite).  Never read again; destroyed at once.
"""

from __future__ import annotations

import errno
import heapq
import os
import stat
from dataclasses import dataclass

from ..destroy import open_subdir
from .item import ignored

MAX_DEPTH = 8                       # folder levels walked below the inbox
DESTROYING_PREFIX = ".lethe-destroying-"


@dataclass
class Candidate:
    """An inbox entry to take: ``unread`` is ``None`` (read it), ``partial``, ``hidden`` or ``leftover``."""

    name: str
    lst: os.stat_result
    complete_at: float
    unread: str | None = None

    @property
    def deadline_key(self):
        return (self.complete_at, self.name)


def complete_time(st: os.stat_result, judged_at: float) -> float:
    """``min(max(mtime, ctime), judged_at)``: see ``complete_at`` in ``agent/intake/pipeline.py``."""
    return min(max(st.st_mtime, st.st_ctime), float(judged_at))


def unfinished_reason(name: str) -> str | None:
    """``'leftover'``, ``'hidden'``, ``'partial'`` or ``None`` for an inbox-relative name."""
    parts = name.split("/")
    if parts[-1].startswith(DESTROYING_PREFIX):
        return "leftover"
    if any(p.startswith(".") for p in parts):
        return "hidden"
    if ignored(parts[-1]):
        return "partial"
    return None


def walk(inbox, max_depth: int = MAX_DEPTH):
    """Yield ``(name, lstat)`` for every non-folder entry under the inbox, folders entered safely.

    Folders on another file system or deeper than ``max_depth`` are not
    entered.  Entries that vanish while walking are skipped.
    """
    yield from _walk(inbox.fd, "", inbox.st.st_dev, 0, max_depth)


def _walk(dfd: int, prefix: str, dev: int, depth: int, max_depth: int):
    try:
        it = os.scandir(dfd)   # streamed: a folder of 10,000 names is never held as one list
    except OSError:
        return
    with it:
        for entry in it:
            base = entry.name
            try:
                lst = os.stat(base, dir_fd=dfd, follow_symlinks=False)
            except FileNotFoundError:
                continue
            name = prefix + base
            if not stat.S_ISDIR(lst.st_mode):
                yield name, lst
                continue
            if lst.st_dev != dev or depth + 1 > max_depth:
                continue
            try:
                sub = open_subdir(dfd, base, expect=lst)
            except OSError as e:
                if e.errno in (errno.ENOENT, errno.ELOOP, errno.ENOTDIR, errno.ESTALE):
                    continue    # swapped or gone: the next scan looks again
                raise
            try:
                yield from _walk(sub, name + "/", dev, depth + 1, max_depth)
            finally:
                os.close(sub)


def scan(inbox, judged_at: float, settle_s: float, raw_seconds: float, limit: int | None = None,
         counts: dict | None = None):
    """Entries under the inbox, split into ``(ready, settling, waiting)``.

    ``ready`` is sorted oldest deadline first and holds files complete (not
    modified within ``settle_s``, or forced at ``raw_seconds / 2``), links,
    pipes, sockets and devices, leftovers, and unfinished names older than
    ``raw_seconds`` (to be destroyed unread).  ``settling`` are files still
    being written; ``waiting`` are unfinished names still inside the window.

    ``limit`` keeps only the ``limit`` ready entries with the closest deadlines
    (a bounded heap while walking: a chunk of a large backlog, in order);
    ``counts["ready"]`` then receives how many were ready in all.
    """
    if limit is not None and int(limit) < 1:
        raise ValueError(f"limit must be a positive number of entries, got {limit!r}")
    settling: list = []
    waiting: list = []
    total = [0]

    def ready_ones():
        for c in _classified():
            total[0] += 1
            yield c

    def _classified():
        for name, lst in walk(inbox):
            why = unfinished_reason(name)
            c = Candidate(name, lst, complete_time(lst, judged_at), unread=why)
            age = judged_at - max(lst.st_mtime, lst.st_ctime)
            if why == "leftover":
                yield c
            elif why is not None:
                if age >= raw_seconds:
                    yield c
                else:
                    waiting.append(c)
            elif stat.S_ISREG(lst.st_mode) and age < settle_s and judged_at - c.complete_at < raw_seconds / 2:
                settling.append(c)
            else:
                yield c

    if limit is None:
        ready = sorted(ready_ones(), key=lambda c: c.deadline_key)
    else:
        ready = heapq.nsmallest(int(limit), ready_ones(), key=lambda c: c.deadline_key)
    if counts is not None:
        counts["ready"] = total[0]
    return ready, settling, waiting
