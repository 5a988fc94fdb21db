"""One raw file end to end, in the order the privacy promise needs, and :func:`drain`.

Per file (``docs/intake.md`` explains each step and what a crash after it means)::

    lstat + safety checks
    -> open O_NOFOLLOW|O_NONBLOCK, fstat the descriptor, read the bytes from it
    -> content MAC (keyed) -> item id = first 32 hex digits
    -> featurise in a worker process (or: paused / rejected / too close to the deadline)
    -> vault: every row and the item marker in ONE transaction (fsync'd), idempotent by item id
    -> ledger  received{item, kind, bytes, complete_at}
               and featurised{item, kind, rows}   or   rejected{item, kind, reason}
               (one append, one fsync, for the whole group)
    -> destroy: overwrite through the open descriptor, unlink by name under the
       inbox descriptor after re-checking (dev, ino), fsync the directory
    -> ledger  destroyed{item, kind, complete_at, exposure_s}

Terminology
-----------
complete_at
    When a raw file became complete: the later of its mtime (last write) and
    ctime (last inode change: a rename into the inbox, or a back-dated mtime
    set with ``utime``, which cannot back-date ctime), capped at the moment the
    agent judged it complete, so neither a copied old mtime nor a clock in the
    future can shrink the recorded exposure.
exposure_s
    ``destroyed_at - complete_at``: how long raw bytes existed in the inbox.
deadline
    ``complete_at + retention.raw_seconds``; files are processed oldest deadline first.
item id
    First 32 hex digits of the HMAC-SHA256 of the file's bytes under the
    content key.  The same bytes give the same id across restarts, so a
    re-read file never writes a second feature row.  Entries refused unread
    (links, pipes, devices, oversize files) get a keyed id of their inode identity.
"""

from __future__ import annotations

from typing import Any

import contextlib
import logging
import os
import stat
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

from ..errors import LetheError, RejectedInput
from ..home import Home
from .item import classify
from ..destroy import entry_kind
from .safety import InboxDir, UnsafeEntry
from .scan import DESTROYING_PREFIX, complete_time, unfinished_reason
from .scan import scan as scan_inbox

log = logging.getLogger("lethe.intake")
logging.getLogger("lethe").addHandler(logging.NullHandler())  # library: silent unless the agent sets a log

ITEMS_TABLE = "intake_items"   # item id -> {"kind", "t", "rows"}: which contents were already kept
RECORDED_KINDS = ("audio", "gps", "accel", "mood", "unknown")
_REFUSED_UNREAD = ("symlink", "fifo", "socket", "device", "hardlink")
UNFINISHED_REASONS = {
    "partial": "a .part file not completed within retention.raw_seconds; destroyed unread",
    "hidden": "a hidden file (or one in a hidden folder) older than retention.raw_seconds; destroyed unread",
}
DEADLINE_MARGIN_MIN_S = 2.0   # files this close to their deadline (or raw_seconds/10; <= raw_seconds/2): unread
TAKEN_LIMIT = 2          # the agent died this often while parsing it: destroyed unparsed ("taken_twice")
DESTROY_SECONDS = 2.0    # bound on the overwrites of one group (the unlinks follow regardless)
PACE_GROUP_FILES = 16   # groups at least this large measure the per-file pace of the durable half
IO_THREADS = 16         # overwrites (and their fsyncs) of one group issued together: the journal commits them at once
READER_TIMEOUT_MIN_S = 5.0   # a child parsing one file longer than max(this, raw_seconds / 3) is stopped


@dataclass
class Outcome:
    """What happened to one inbox entry.  ``shown`` may name the file: never persist it."""

    shown: str
    item: str
    kind: str
    status: str                 # "featurised", "duplicate", "rejected"
    reason: str | None = None
    detail: str | None = None
    bytes: int = 0
    rows: int = 0               # feature rows newly written
    n_samples: int = 0
    complete_at: float = 0.0
    destroyed_at: float | None = None
    exposure_s: float | None = None
    removed: bool = False
    warnings: list[str] = field(default_factory=list)
    name: str = field(default="", repr=False)   # the inbox name; never persist it
    featurise_s: float = 0.0
    overwritten_bytes: int = 0
    aside: bool = False         # renamed to a leftover name before its destruction

    @property
    def error(self) -> str | None:
        if self.status != "rejected":
            return None
        return f"{self.shown}: rejected ({self.reason}): {self.detail}"


@dataclass
class _Work:
    """One entry on its way through :meth:`Intake.process_many`."""

    name: str
    lst: os.stat_result
    opened: Any
    data: bytes | None
    out: Outcome
    final: bool = False   # rejected before featurising (unsafe, unread, paused, unknown)
    res: object = None
    taken_at: float = field(default_factory=time.time)   # when _prepare looked at it (real clock)


class Intake:
    """The per-file pipeline over one home: inbox descriptor, vault, ledger and content key.

    Parameters
    ----------
    home : Home or path-like
    policy : agent.policy.Policy
    vault, ledger : optional
        Already-open :class:`agent.vault.Vault` and :class:`agent.ledger.Ledger`;
        opened from the home when omitted (and then closed by :meth:`close`).
    now : float, optional
        A fixed clock for featurising (the readers' "not in the future" check);
        the demo's backfill passes its simulated time.  Exposure and pause are
        always judged on the real clock.
    workers : int, optional
        Threads used to featurise and overwrite a group of files (default:
        up to 2).  The order of steps per file does not depend on it.
    isolate : bool
        Parse in forked children (:mod:`agent.intake.worker`), one per
        thread, whose death the agent survives: the file is then rejected
        ``reader_crashed`` (or ``reader_timeout`` after
        :attr:`reader_timeout_s`).  The agent (``run_agent``, ``lethe run``)
        always isolates; the library default parses in-process, where a
        file the process died parsing twice is destroyed unparsed
        (``taken_twice``, :class:`~agent.intake.ledgerlog.ParseMarks`).
    """

    def __init__(self, home, policy, *, vault=None, ledger=None, content_key: bytes | None = None,
                 now: float | None = None, workers: int | None = None, isolate: bool = False):
        from ..keystore import Keystore

        self.home = home if isinstance(home, Home) else Home(home)
        self.policy = policy
        self.now = None if now is None else float(now)
        self.raw_seconds = float(policy.retention.raw_seconds)
        ks: Any = None
        if content_key is None or ledger is None or vault is None:
            ks = Keystore(self.home).ensure()
        self._key = content_key if content_key is not None else ks.content_key()
        self._own = []
        if vault is None:
            from ..vault import Vault

            vault = Vault.open(self.home)
            self._own.append(vault)
        if ledger is None:
            from ..ledger import Ledger

            ledger = Ledger(self.home, signing_key=ks.device_key())
        self.vault = vault
        self.ledger = ledger
        self.inbox = InboxDir(self.home.inbox, policy.intake.max_file_bytes)
        # Items a previous run left open (received, never destroyed): the only ones reconcile may close,
        # and the only ones whose sighting is remembered (nothing per file is kept for a whole drain).
        # Read on the first file taken (before this run's first ``received``), not here: reading the
        # ledger's state before its first append would keep a torn tail from being repaired by it.
        self.open_at_start: set[str] | None = None
        self._open_known = False
        self.seen_items: set[str] = set()
        # Read, parse and commit must fit before the deadline: closer than this, a file is destroyed unread.
        self.base_margin_s = min(max(DEADLINE_MARGIN_MIN_S, self.raw_seconds / 10.0), self.raw_seconds / 2.0)
        self.recent_latency_s = 0.0   # decaying maximum of "taken -> destroyed" over the last groups
        # A backlog: files queued behind the group being taken (set by the drain) and the recent wall time of
        # the durable half per file (what destroying each of them will take at least, parsed or not).
        self.ready_total = 0
        self.queued_after = 0
        self.per_file_s = 0.0
        if workers is None:
            workers = min(2, os.cpu_count() or 1)
        if int(workers) < 1:
            raise ValueError(f"workers must be a positive number of threads, got {workers!r}")
        self.workers = int(workers)
        self._executor: ThreadPoolExecutor | None = None
        self._io_executor: ThreadPoolExecutor | None = None
        self._ledger_started = False
        self.reader_timeout_s = max(READER_TIMEOUT_MIN_S, self.raw_seconds / 3.0)
        self.isolate = bool(isolate) and hasattr(os, "fork")
        self.pool: Any = None   # ForkedPool, made on the first group to parse
        self.gps_buffered = self.vault.count("gps_fixes") > 0   # the watcher prunes them by the clock
        self._readers_loaded = False
        self.taken_limit = TAKEN_LIMIT
        self.forced: set[str] = set()   # unfinished names the watcher saw past their window
        self.group_files = 1     # grows while groups are quick (see agent.intake.drain)
        self.log = LedgerWriter(self.home, self.ledger)
        self.parsing = ParseMarks(self.home)
        self.suspects = self.parsing.counts   # item -> lives that died while parsing it

    def close(self) -> None:
        self.parsing.close()
        if self.pool is not None:
            self.pool.close()
            self.pool = None
        if self._executor is not None:
            self._executor.shutdown(wait=True)
            self._executor = None
        if self._io_executor is not None:
            self._io_executor.shutdown(wait=True)
            self._io_executor = None
        self.inbox.close()
        for v in self._own:
            v.close()
        self._own = []

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # -- identities ----------------------------------------------------------
    def mac(self, data: bytes) -> str:
        from ..keystore import content_mac

        return content_mac(self._key, data)

    def name_tag(self, name: str) -> str:
        """A short keyed hash of a file name for the local log (never the name itself)."""
        return self.mac(b"lethe/name\0" + os.fsencode(name))[:10]

    def _unread_item(self, name: str, st: os.stat_result) -> str:
        ident = f"{st.st_dev}:{st.st_ino}:{st.st_mtime_ns}:{st.st_ctime_ns}:".encode()
        return self.mac(b"lethe/unread\0" + ident + os.fsencode(name))[:32]

    # -- scanning ------------------------------------------------------------
    def scan(self, judged_at: float | None = None, settle_s: float | None = None, limit: int | None = None):
        """Entries under the inbox (subfolders walked safely): ``(ready, settling, waiting)``.

        See :func:`agent.intake.scan.scan`: ``ready`` is sorted oldest deadline
        first and includes unfinished names (``.part``, hidden) past the window,
        to be destroyed unread; ``waiting`` are unfinished names still inside it.
        ``limit`` keeps only that many ready entries, the closest deadlines.
        """
        judged_at = time.time() if judged_at is None else judged_at
        settle_s = float(self.policy.retention.settle_seconds if settle_s is None else settle_s)
        counts: dict = {}
        ready, settling, waiting = scan_inbox(self.inbox, judged_at, settle_s, self.raw_seconds, limit=limit,
                                              counts=counts)
        self.ready_total = int(counts.get("ready", len(ready)))
        if self.parsing.suspect_tags:
            # Files a dead agent was parsing go last (and alone: see drain), so a kill that hit
            # them by chance does not hit them again first thing in the next life.
            # GPS files keep their order: the stays folded from the buffer depend on it.
            ready.sort(key=lambda c: (self.is_suspect(c.name) and classify(c.name) != "gps", c.deadline_key))
        return ready, settling, waiting

    def is_suspect(self, name: str) -> bool:
        """Whether an agent died while parsing the file now at ``name`` (by its keyed name tag)."""
        return bool(self.parsing.suspect_tags) and self.name_tag(name) in self.parsing.suspect_tags

    # -- files -------------------------------------------------------------------
    def process(self, name: str, judged_at: float | None = None) -> Outcome | None:
        """Take one inbox entry through the pipeline.

        Returns ``None`` when there is nothing to do (gone, ignored, a
        directory, or it changed under us and will be looked at again).
        """
        outs = self.process_many([name], judged_at)
        return outs[0] if outs else None

    def process_many(self, names, judged_at: float | None = None) -> list[Outcome]:
        """Take several entries through the pipeline together, each step for all of them before the next.

        For every file the order of steps is exactly the one in the module
        docstring; grouping only shares the durable writes (one ledger append
        per step, one vault commit, one directory fsync), which is what makes a
        backfill fast.  Entries that are gone, ignored, directories or changed
        under us are left out of the result.
        """
        t0 = time.monotonic()
        outs = self._back(self._front(names, judged_at))
        self._grew(time.monotonic() - t0)
        return outs

    def _grew(self, seconds: float) -> None:
        """Adapt the group size to how long the last group took (bounded in files and time)."""
        from . import drain as _drain_mod

        if seconds > _drain_mod.GROUP_SECONDS:
            self.group_files = max(1, self.group_files // 2)
        else:
            self.group_files = min(_drain_mod.BATCH_FILES, self.group_files * 2)

    def process_groups(self, groups, on_outcome=None) -> int:
        """:meth:`process_many` over several groups, the next group's reading and featurising
        overlapping the previous group's durable half (commit, ledger, destruction).

        Returns how many entries were taken; each outcome goes to ``on_outcome``
        as its group finishes (none is kept here, so memory does not grow with
        the backlog).

        Per file the order of steps is unchanged; only different files' steps
        overlap.  A group whose processing fails is left in the inbox for the
        next pass (as after a crash) and logged by its error class.
        """
        from concurrent.futures import ThreadPoolExecutor

        done = 0

        def collect(fut):
            nonlocal done
            try:
                got = fut.result()
            except (OSError, ValueError) as e:
                log.error("intake_error group error=%s", type(e).__name__)
                return
            done += len(got)
            if on_outcome is not None:
                for o in got:
                    on_outcome(o)

        with ThreadPoolExecutor(max_workers=1, thread_name_prefix="lethe-commit") as ex:
            fut, started = None, 0.0
            for names in groups:
                t0 = time.monotonic()
                try:
                    works = self._front(names)
                except (OSError, ValueError) as e:
                    log.error("intake_error group error=%s", type(e).__name__)
                    works = []
                if fut is not None:
                    collect(fut)
                    self._grew(time.monotonic() - started)
                fut, started = ex.submit(self._back, works), t0
            if fut is not None:
                collect(fut)
                self._grew(time.monotonic() - started)
        return done

    def _front(self, names, judged_at: float | None = None) -> list:
        """Steps 1-4 for a group: look, open, read, MAC, featurise (``received`` is written by :meth:`_back`)."""
        judged_at = time.time() if judged_at is None else float(judged_at)
        works: list[_Work] = []
        try:
            for name in names:
                w = self._prepare(name, judged_at)
                if w is not None:
                    works.append(w)
            if works:
                self._featurise_all(works)
            return works
        except BaseException:
            for w in works:
                if w.opened is not None:
                    w.opened.close()
            raise

    def _back(self, works) -> list[Outcome]:
        """Steps 5-8 for a group: vault commit, ``received`` + ``featurised``/``rejected``, destroy, ``destroyed``.

        Every ledger write of a group happens here, in two appends (one fsync
        each): ``received`` and the outcome of every file of the group after
        the vault commit and before any destruction, then ``destroyed`` for the
        entries gone.  (``received`` used to be a third append before
        featurising; an agent killed while featurising leaves its files in the
        inbox, to be received when taken again, so nothing is lost by writing
        it with the outcome.)  Destruction never waits for bookkeeping: a ledger that cannot be
        written (disk full, a damaged line) only queues the entries
        (:class:`LedgerWriter`); the files are destroyed all the same.
        """
        t_back = time.monotonic()
        try:
            if not works:
                return []
            steps = [("received", {"item": w.out.item, "kind": w.out.kind, "bytes": w.out.bytes,
                                   "complete_at": w.out.complete_at}) for w in works]
            if self._ledger_empty():
                # A new ledger must start before the vault holds data (it refuses to start over data).
                self.log.write(steps)
                steps = []
            self._commit_all(works)
            for w in works:
                o = w.out
                if o.status == "rejected":
                    steps.append(("rejected", {"item": o.item, "kind": o.kind, "reason": o.reason}))
                    log.warning("rejected item=%s kind=%s reason=%s type=%s", o.item[:12], o.kind,
                                o.reason, entry_kind(w.lst))
                else:
                    steps.append(("featurised", {"item": o.item, "kind": o.kind, "rows": o.rows}))
            self.log.write(steps)
            self._destroy_all(works)
            gone = [w for w in works if w.out.removed]
            for w in works:
                if not w.out.removed:
                    log.error("not_destroyed item=%s kind=%s: the entry could not be removed; looked at again",
                              w.out.item[:12], w.out.kind)
            self.log.write([("destroyed", {"item": w.out.item, "kind": w.out.kind,
                                           "complete_at": w.out.complete_at,
                                           "exposure_s": w.out.exposure_s}) for w in gone])
            if len(works) >= PACE_GROUP_FILES:   # a queue is destroyed in full groups: small ones overstate it
                per = (time.monotonic() - t_back) / len(works)
                self.per_file_s = per if not self.per_file_s else 0.7 * self.per_file_s + 0.3 * per
            return [w.out for w in works]
        finally:
            for w in works:
                if w.opened is not None:
                    w.opened.close()

    @property
    def deadline_margin_s(self) -> float:
        """How close to its deadline a file may be taken and still be read: the larger of the base margin
        (``max(2 s, raw_seconds / 10)``) and twice the recent time from taking a file to destroying it
        (so a loaded machine starts destroying unread earlier), never more than ``raw_seconds / 2``."""
        return min(max(self.base_margin_s, 2.0 * self.recent_latency_s), self.raw_seconds / 2.0)

    def _ledger_empty(self) -> bool:
        if self._ledger_started:
            return False
        try:
            self._ledger_started = os.stat(self.home.ledger_path).st_size > 0
        except FileNotFoundError:
            return True
        return not self._ledger_started

    def _items_open_at_start(self) -> set[str] | None:
        if not self._open_known:
            self._open_known = True
            try:
                self.open_at_start = set(open_items(self.ledger))
            except (OSError, LetheError, ValueError):
                self.open_at_start = None   # reconcile then remembers every item seen
        return self.open_at_start

    def _prepare(self, name: str, judged_at: float):
        """lstat, safety checks, safe open and read, item id.  ``None``: nothing to take now."""
        unfinished = unfinished_reason(name)
        if unfinished == "leftover":
            return None   # see finish_leftovers
        lst = self.inbox.lstat(name)
        if lst is None or stat.S_ISDIR(lst.st_mode):
            return None
        kind = classify(name) or "unknown"
        complete_at = complete_time(lst, judged_at)
        opened, data, err = None, None, None
        refusal = self.inbox.refusal(name, lst)
        if unfinished is not None:
            if name not in self.forced and judged_at - max(lst.st_mtime, lst.st_ctime) < self.raw_seconds:
                return None   # a writer may still finish it
            self.forced.discard(name)
            err = UnsafeEntry(self.inbox.display(name), unfinished, UNFINISHED_REASONS[unfinished])
            kind = "unknown"
        elif refusal is not None and refusal.reason in _REFUSED_UNREAD:
            err = refusal
        if err is None or (unfinished is not None and stat.S_ISREG(lst.st_mode) and lst.st_nlink == 1):
            try:
                # Oversize and unfinished files are opened too, but only so they can be overwritten.
                opened = self.inbox.open(name, lst, check_size=False)
            except UnsafeEntry as e:
                if e.reason == "changed":
                    return None  # swapped under us; the next event or sweep looks again
                if e.reason in _REFUSED_UNREAD:
                    lst = self.inbox.lstat(name)
                    if lst is None:
                        return None
                err = err or e
            if err is None and opened is not None:
                if opened.st.st_size > self.inbox.max_file_bytes:
                    err = UnsafeEntry(self.inbox.display(name), "too_large",
                                      f"{opened.st.st_size} bytes exceeds intake.max_file_bytes = "
                                      f"{self.inbox.max_file_bytes}")
                else:
                    try:
                        data = self.inbox.read(opened)
                    except UnsafeEntry as e:
                        err = e
        shown = self.inbox.display(name)
        if err is not None:
            size = opened.st.st_size if opened is not None else (lst.st_size if stat.S_ISREG(lst.st_mode) else 0)
            out = Outcome(shown, self._unread_item(name, lst), kind, "rejected", err.reason, err.detail,
                          bytes=size, complete_at=complete_at, name=name)
            w = _Work(name, lst, opened, None, out, final=True)
        else:
            assert data is not None  # read above whenever there was no error
            out = Outcome(shown, self.mac(data)[:32], kind, "rejected", bytes=len(data), complete_at=complete_at,
                          name=name)
            w = _Work(name, lst, opened, data, out)
            behind_s = self.queued_after * self.per_file_s   # destroying everything queued behind it
            if judged_at + behind_s >= complete_at + self.raw_seconds - self.deadline_margin_s:
                # The retention rule wins over featurising: too close to its deadline to be parsed and
                # committed in time, or so many files are queued behind it that destroying them all at
                # the recent pace would reach the deadline (more arrived than the machine can featurise
                # in the window).  Its bytes were read for the item id only (the same id in every life).
                w.final, w.data = True, None
                out.reason = "retention_deadline"
                out.detail = (f"not featurised within retention.raw_seconds = {self.raw_seconds:g} s "
                              f"(intake was behind); destroyed unparsed")
            elif self.suspects.get(out.item, 0) >= self.taken_limit:
                # Taken before without an outcome, the agent died each time: never parse it again.
                w.final, w.data = True, None
                out.reason = "taken_twice"
                out.detail = (f"the agent died {self.suspects[out.item]} times while parsing it; "
                              f"destroyed unparsed")
                log.error("taken_twice item=%s kind=%s", out.item[:12], kind)
        open0 = self._items_open_at_start()
        if open0 is None or out.item in open0:
            self.seen_items.add(out.item)
        return w

    def _featurise_all(self, works) -> None:
        """Decide what may be kept and featurise it; bad content only ever marks an item rejected."""
        from ..pause import is_paused

        todo = [w for w in works if not w.final]
        if todo and is_paused(self.home):
            for w in todo:
                w.final, w.data = True, None
                w.out.reason, w.out.detail = "paused", "intake is paused; nothing is kept from this file"
            return
        for w in todo:
            if w.out.kind == "unknown":
                w.final, w.data = True, None
                w.out.reason = "unknown_format"
                w.out.detail = ("unrecognised file name suffix; expected .wav .flac .ogg .gpx .nmea .gps.csv "
                                ".accel.csv .mood.csv or .mood.json")
        todo = [w for w in todo if not w.final]
        if self.isolate and todo:
            self._featurise_forked(todo)
        else:
            self._each(self._featurise_one, todo)

    def prune_gps(self):
        """Drop buffered GPS fixes older than ``gps_buffer_minutes`` before the clock (the simulated one if set)."""
        from . import gpsbuffer

        rep = gpsbuffer.prune(self.vault, self.policy, now=self.now)
        self.gps_buffered = rep.fixes_left > 0
        if rep.fixes_deleted:
            log.info("gps_pruned fixes=%d stays_new=%d", rep.fixes_deleted, rep.stays_new)
        return rep

    def load_readers(self) -> None:
        """Import and warm up the readers in this process, once (forked children inherit them)."""
        if not self._readers_loaded:
            from . import warm_up

            warm_up(self.policy)
            with contextlib.suppress(ImportError):
                import threadpoolctl  # noqa: F401  (the forked workers limit their BLAS pools with it)
            self._readers_loaded = True

    def _featurise_forked(self, todo) -> None:
        """Parse in forked children, one per thread; a child's death takes only the file it was parsing."""
        from .worker import ForkedPool, WorkerDied

        self.load_readers()
        if self.pool is None:
            self.pool = ForkedPool(self.policy, self.workers)   # forked now: the readers are loaded
        n = min(self.workers, len(todo))
        chunks = [todo[i::n] for i in range(n)]

        def run(chunk):
            t0 = time.perf_counter()
            answers = self.pool.run([(w.name, w.data) for w in chunk], self.now, self.reader_timeout_s)
            for w, ans in zip(chunk, answers, strict=True):
                w.data = None
                w.out.featurise_s = (time.perf_counter() - t0) / len(chunk)
                if isinstance(ans, WorkerDied):
                    w.out.reason, w.out.detail = ans.reason, ans.detail
                    log.error("%s item=%s kind=%s", ans.reason, w.out.item[:12], w.out.kind)
                elif isinstance(ans, RejectedInput):
                    w.out.reason, w.out.detail = ans.reason, ans.detail
                else:
                    w.res = ans

        self._each(run, chunks)

    def _featurise_one(self, w) -> None:
        from . import featurise

        t0 = time.perf_counter()
        # survives the process dying in the reader (not a power loss)
        self.parsing.begin(w.out.item, self.name_tag(w.name))
        try:
            w.res = featurise(w.name, w.data, self.policy, now=self.now)
        except RejectedInput as e:
            w.out.reason, w.out.detail = e.reason, e.detail
        except Exception as e:  # noqa: BLE001 - a reader bug must not stop the agent nor keep the file
            w.out.reason, w.out.detail = "reader_error", f"{type(e).__name__} in the reader"
            log.error("reader_error item=%s kind=%s error=%s", w.out.item[:12], w.out.kind, type(e).__name__)
        finally:
            self.parsing.end(w.out.item, self.name_tag(w.name))
            w.data = None  # the raw bytes are not needed any more
            w.out.featurise_s = time.perf_counter() - t0

    def _commit_all(self, works) -> None:
        """One durable vault transaction for the whole group; on failure, item by item."""
        keep = [w for w in works if w.res is not None]
        if not keep:
            return
        try:
            with self.vault.transaction():
                for w in keep:
                    w.out.rows = self._put_rows(w.out.item, w.res)
        except Exception:  # noqa: BLE001 - whatever failed the group, retry item by item below
            for w in keep:
                try:
                    w.out.rows = self.commit(w.out.item, w.res)
                except Exception as e:  # noqa: BLE001 - one item the vault refuses must not stop intake
                    w.res = None
                    w.out.reason = "store_failed"
                    w.out.detail = f"the vault refused the features ({type(e).__name__})"
                    log.error("store_failed item=%s kind=%s error=%s", w.out.item[:12], w.out.kind,
                              type(e).__name__)
        for w in keep:
            if w.res is not None:
                w.out.status = "featurised" if w.out.rows else "duplicate"
                w.out.n_samples = int(w.res.n_samples)
                w.out.warnings = list(w.res.warnings)
                w.res = None

    def commit(self, item: str, res) -> int:
        """Write an item's rows in one transaction, idempotent by item id; returns rows newly written."""
        with self.vault.transaction():
            return self._put_rows(item, res)

    def _put_rows(self, item: str, res) -> int:
        from . import gpsbuffer

        v = self.vault
        with v.transaction():
            if (ITEMS_TABLE, item) in v:
                return 0
            n = 0
            for table, rows in res.rows.items():
                n += v.put_many(table, [(f"{item}{suffix}", obj) for suffix, obj in rows])
            if "gps_fixes" in res.rows:
                gpsbuffer.fold(v, self.policy)  # per GPS item, so grouping never changes the stays
                self.gps_buffered = True
            v.put(ITEMS_TABLE, item, {"kind": res.kind, "t": time.time(), "rows": n})
        return n

    def _destroy_all(self, works) -> None:
        """Rename aside, overwrite (bounded) through each descriptor, unlink, one folder fsync each.

        An opened file is first renamed to ``.lethe-destroying-<item>-<inode>``
        in its own folder, so a restart after a kill mid-destruction finishes
        it (:meth:`finish_leftovers`) instead of taking its zero-filled remains
        in as a new file.  Each overwrite is bounded by the allocated blocks,
        ``intake.max_file_bytes`` and :data:`DESTROY_SECONDS`.
        """
        for w in works:
            if w.opened is not None and w.opened.fd >= 0:
                w.name = self._aside(w)
                w.out.aside = w.name != w.out.name
        held = [w for w in works if w.opened is not None]
        deadline = time.monotonic() + DESTROY_SECONDS
        self._each_io(lambda w: self.inbox.overwrite(w.opened, deadline=deadline), held)
        for w in works:
            w.out.removed = self.inbox.unlink_checked(w.name, w.opened, None if w.opened else w.lst)
            if w.opened is not None:
                w.out.overwritten_bytes = w.opened.overwritten
        # Closing the last descriptor of an unlinked file frees its blocks: also worth overlapping.
        self._each_io(lambda w: w.opened.close(), held)
        for w in works:
            w.opened = None
        for folder in sorted({w.name.rpartition("/")[0] for w in works}):
            self.inbox.fsync(folder + "/x" if folder else None)
        t = time.time()
        taken = min((w.taken_at for w in works), default=t)
        self.recent_latency_s = max(t - taken, 0.9 * self.recent_latency_s)
        for w in works:
            w.out.destroyed_at = t
            w.out.exposure_s = round(max(0.0, t - w.out.complete_at), 6)

    def _aside(self, w) -> str:
        """Rename an opened file to its leftover name in the same folder; the original name if that fails."""
        folder, _, base = w.name.rpartition("/")
        new_base = f"{DESTROYING_PREFIX}{w.out.item[:32]}-{w.opened.st.st_ino}"
        with self.inbox.parent(w.name) as (dfd, base_now):
            if dfd is None:
                return w.name
            try:
                now = os.stat(base_now, dir_fd=dfd, follow_symlinks=False)
                if (now.st_dev, now.st_ino) != (w.opened.st.st_dev, w.opened.st.st_ino):
                    return w.name
                os.rename(base_now, new_base, src_dir_fd=dfd, dst_dir_fd=dfd)
            except OSError:
                return w.name
        return f"{folder}/{new_base}" if folder else new_base

    def finish_leftovers(self) -> int:
        """Destroy, unread, files whose destruction a killed agent had begun; returns how many.

        Their items are closed by :meth:`reconcile` (they are never "seen" again).
        """
        from ..destroy import destroy_entry

        n = 0
        for c in self.scan(settle_s=0.0)[0]:
            if c.unread != "leftover":
                continue
            with self.inbox.parent(c.name) as (dfd, base):
                if dfd is not None and destroy_entry(dfd, base, max_bytes=self.inbox.max_file_bytes,
                                                     expect=c.lst).gone:
                    n += 1
            self.inbox.fsync(c.name)
        if n:
            log.warning("finished %d destruction(s) a previous run had begun", n)
        return n

    def _each(self, fn, items) -> None:
        if len(items) > 1 and self.workers > 1:
            list(self._pool().map(fn, items))
        else:
            for x in items:
                fn(x)

    def _each_io(self, fn, items) -> None:
        """``fn`` over ``items`` in up to :data:`IO_THREADS` threads (blocking I/O: fsync, freeing blocks).

        Concurrent fsyncs of a group's files share the file system's journal
        commits instead of waiting for one each; the threads hold no lock of
        the agent and only wait on the kernel.
        """
        if len(items) <= 1:
            for x in items:
                fn(x)
            return
        if self._io_executor is None:
            from concurrent.futures import ThreadPoolExecutor

            self._io_executor = ThreadPoolExecutor(max_workers=IO_THREADS, thread_name_prefix="lethe-io")
        list(self._io_executor.map(fn, items))

    def _pool(self):
        if self._executor is None:
            self._executor = ThreadPoolExecutor(max_workers=self.workers, thread_name_prefix="lethe-intake")
        return self._executor

    # -- restart reconciliation -------------------------------------------------
    def reconcile(self, started_at: float) -> int:
        """Close items a previous run received but did not record as destroyed.

        Called after the start-up sweep: an item still open in the ledger whose
        bytes were not among the files just swept was unlinked by a run killed
        before it could write ``destroyed``.  Its exposure is recorded as an
        upper bound (this run's start minus ``complete_at``) with ``recovered``.
        Returns how many items were closed.
        """
        n = 0
        open0 = self._items_open_at_start()
        try:
            opened = open_items(self.ledger)
        except (OSError, LetheError, ValueError) as e:
            self.log.alarm("ledger_unreadable", e)
            return 0
        for item, entry in opened.items():
            if item in self.seen_items or (open0 is not None and item not in open0):
                continue   # swept in this run, or received in this run and still waiting in the inbox
            complete_at = float(entry.get("complete_at") or started_at)
            self.log.write([("destroyed", {"item": item, "kind": entry.get("kind", "unknown"),
                                           "complete_at": complete_at,
                                           "exposure_s": round(max(0.0, started_at - complete_at), 6)})])
            n += 1
        return n


def open_items(ledger) -> dict[str, dict]:
    """Items whose latest ``received`` has no ``destroyed`` after it: ``{item: received_entry}``."""
    if hasattr(ledger, "open_items"):
        # The ledger's running state (checkpointed): start-up does not re-read the whole ledger.
        return ledger.open_items()
    opened: dict[str, dict] = {}
    for e in ledger.entries():
        ev = e.get("event")
        item = e.get("item")
        if item is None:
            continue
        if ev == "received":
            opened[item] = e
        elif ev == "destroyed":
            opened.pop(item, None)
    return opened




from .ledgerlog import LedgerWriter, ParseMarks  # noqa: E402  (after Intake: it imports nothing from here)


_FROM_DRAIN = ("BATCH_BYTES", "BATCH_FILES", "STUCK_PASSES", "batches", "drain", "process_safely")


def __getattr__(name):
    """``drain`` and its constants moved to ``agent.intake.drain``; still importable from here."""
    if name in _FROM_DRAIN:
        from . import drain as _drain_mod

        return getattr(_drain_mod, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
