"""One raw file end to end, in the order the privacy promise needs, and :func:`drain`.

Per file (``docs/intake.md`` explains each step and what a crash after it means)::

    lstat + safety checks
    -> open O_NOFOLLOW|O_NONBLOCK, fstat the descriptor, read the bytes from it
    -> content MAC (keyed) -> item id = first 32 hex digits
    -> ledger  received{item, kind, bytes, complete_at}
    -> featurise (or: paused / rejected)
    -> vault: every row and the item marker in ONE transaction (fsync'd), idempotent by item id
    -> ledger  featurised{item, kind, rows}   or   rejected{item, kind, reason}
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

import logging
import os
import stat
import time
from collections import Counter, defaultdict
from dataclasses import dataclass, field

from ..errors import RejectedInput
from ..home import Home
from ..stats import exposure_summary
from .item import classify, ignored
from .safety import InboxDir, UnsafeEntry, entry_type

log = logging.getLogger("lethe.intake")
logging.getLogger("lethe").addHandler(logging.NullHandler())  # library: silent unless the agent sets a log

ITEMS_TABLE = "intake_items"   # item id -> {"kind", "t", "rows"}: which contents were already kept
RECORDED_KINDS = ("audio", "gps", "accel", "mood", "unknown")
_REFUSED_UNREAD = ("symlink", "fifo", "socket", "device", "hardlink")


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
    opened: object
    data: bytes | None
    out: Outcome
    final: bool = False   # rejected before featurising (unsafe, unread, paused, unknown)
    res: object = None


@dataclass
class Candidate:
    name: str
    lst: os.stat_result
    complete_at: float

    @property
    def deadline_key(self):
        return (self.complete_at, self.name)


def complete_time(st: os.stat_result, judged_at: float) -> float:
    """``min(max(mtime, ctime), judged_at)``: see ``complete_at`` in the module docstring."""
    return min(max(st.st_mtime, st.st_ctime), float(judged_at))


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
    """

    def __init__(self, home, policy, *, vault=None, ledger=None, content_key: bytes | None = None,
                 now: float | None = None, workers: int | None = None):
        from ..keystore import Keystore

        self.home = home if isinstance(home, Home) else Home(home)
        self.policy = policy
        self.now = None if now is None else float(now)
        self.raw_seconds = float(policy.retention.raw_seconds)
        ks = None
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
        self.seen_items: set[str] = set()
        if workers is None:
            workers = min(2, os.cpu_count() or 1)
        if int(workers) < 1:
            raise ValueError(f"workers must be a positive number of threads, got {workers!r}")
        self.workers = int(workers)
        self._executor = None

    def close(self) -> None:
        if self._executor is not None:
            self._executor.shutdown(wait=True)
            self._executor = None
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
    def scan(self, judged_at: float | None = None, settle_s: float | None = None):
        """Entries directly in the inbox, split into ``(ready, settling, skipped)``.

        ``ready`` is sorted oldest deadline first; ``settling`` are regular
        files modified less than ``settle_s`` ago; ``skipped`` are
        ``(name, why)`` pairs for subdirectories (never descended, never removed).
        """
        judged_at = time.time() if judged_at is None else judged_at
        settle_s = float(self.policy.retention.settle_seconds if settle_s is None else settle_s)
        ready, settling, skipped = [], [], []
        for name in self.inbox.names():
            if ignored(name):
                continue
            lst = self.inbox.lstat(name)
            if lst is None:
                continue
            if stat.S_ISDIR(lst.st_mode):
                skipped.append((name, "directory"))
                continue
            c = Candidate(name, lst, complete_time(lst, judged_at))
            if stat.S_ISREG(lst.st_mode) and judged_at - max(lst.st_mtime, lst.st_ctime) < settle_s:
                if judged_at - c.complete_at < self.raw_seconds / 2:
                    settling.append(c)
                    continue
            ready.append(c)
        ready.sort(key=lambda c: c.deadline_key)
        return ready, settling, skipped

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
        return self._back(self._front(names, judged_at))

    def process_groups(self, groups, on_outcome=None) -> list[Outcome]:
        """:meth:`process_many` over several groups, the next group's reading and featurising
        overlapping the previous group's durable half (commit, ledger, destruction).

        Per file the order of steps is unchanged; only different files' steps
        overlap.  A group whose processing fails is left in the inbox for the
        next pass (as after a crash) and logged by its error class.
        """
        from concurrent.futures import ThreadPoolExecutor

        outs: list[Outcome] = []

        def collect(fut):
            try:
                got = fut.result()
            except (OSError, ValueError) as e:
                log.error("intake_error group error=%s", type(e).__name__)
                return
            outs.extend(got)
            if on_outcome is not None:
                for o in got:
                    on_outcome(o)

        with ThreadPoolExecutor(max_workers=1, thread_name_prefix="lethe-commit") as ex:
            fut = None
            for names in groups:
                try:
                    works = self._front(names)
                except (OSError, ValueError) as e:
                    log.error("intake_error group error=%s", type(e).__name__)
                    works = []
                if fut is not None:
                    collect(fut)
                fut = ex.submit(self._back, works)
            if fut is not None:
                collect(fut)
        return outs

    def _front(self, names, judged_at: float | None = None) -> list:
        """Steps 1-5 for a group: look, open, read, MAC, ``received``, featurise."""
        judged_at = time.time() if judged_at is None else float(judged_at)
        works: list[_Work] = []
        try:
            for name in names:
                w = self._prepare(name, judged_at)
                if w is not None:
                    works.append(w)
            if works:
                self.ledger.append_many([("received", {"item": w.out.item, "kind": w.out.kind,
                                                       "bytes": w.out.bytes, "complete_at": w.out.complete_at})
                                         for w in works])
                self._featurise_all(works)
            return works
        except BaseException:
            for w in works:
                if w.opened is not None:
                    w.opened.close()
            raise

    def _back(self, works) -> list[Outcome]:
        """Steps 6-9 for a group: vault commit, ``featurised``/``rejected``, destroy, ``destroyed``."""
        try:
            if not works:
                return []
            self._commit_all(works)
            steps = []
            for w in works:
                o = w.out
                if o.status == "rejected":
                    steps.append(("rejected", {"item": o.item, "kind": o.kind, "reason": o.reason}))
                    log.warning("rejected item=%s kind=%s reason=%s type=%s name#=%s", o.item[:12], o.kind,
                                o.reason, entry_type(w.lst), self.name_tag(w.name))
                else:
                    steps.append(("featurised", {"item": o.item, "kind": o.kind, "rows": o.rows}))
            self.ledger.append_many(steps)
            self._destroy_all(works)
            self.ledger.append_many([("destroyed", {"item": w.out.item, "kind": w.out.kind,
                                                    "complete_at": w.out.complete_at,
                                                    "exposure_s": w.out.exposure_s}) for w in works])
            return [w.out for w in works]
        finally:
            for w in works:
                if w.opened is not None:
                    w.opened.close()

    def _prepare(self, name: str, judged_at: float):
        """lstat, safety checks, safe open and read, item id.  ``None``: nothing to take now."""
        if ignored(name):
            return None
        lst = self.inbox.lstat(name)
        if lst is None or stat.S_ISDIR(lst.st_mode):
            return None
        kind = classify(name) or "unknown"
        complete_at = complete_time(lst, judged_at)
        opened, data, err = None, None, None
        refusal = self.inbox.refusal(name, lst)
        if refusal is not None and refusal.reason in _REFUSED_UNREAD:
            err = refusal
        else:
            try:
                # Oversize files are opened too, but only so they can be overwritten.
                opened = self.inbox.open(name, lst, check_size=False)
            except UnsafeEntry as e:
                if e.reason == "changed":
                    return None  # swapped under us; the next event or sweep looks again
                if e.reason in _REFUSED_UNREAD:
                    lst = self.inbox.lstat(name)
                    if lst is None:
                        return None
                err = e
            if opened is not None:
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
            out = Outcome(shown, self.mac(data)[:32], kind, "rejected", bytes=len(data), complete_at=complete_at,
                          name=name)
            w = _Work(name, lst, opened, data, out)
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
        self._each(self._featurise_one, [w for w in todo if not w.final])

    def _featurise_one(self, w) -> None:
        from . import featurise

        t0 = time.perf_counter()
        try:
            w.res = featurise(w.name, w.data, self.policy, now=self.now)
        except RejectedInput as e:
            w.out.reason, w.out.detail = e.reason, e.detail
        except Exception as e:  # a reader bug must not stop the agent nor keep the file
            w.out.reason, w.out.detail = "reader_error", f"{type(e).__name__} in the reader"
            log.error("reader_error item=%s kind=%s error=%s", w.out.item[:12], w.out.kind, type(e).__name__)
        finally:
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
        except Exception:
            for w in keep:
                try:
                    w.out.rows = self.commit(w.out.item, w.res)
                except Exception as e:
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
            v.put(ITEMS_TABLE, item, {"kind": res.kind, "t": time.time(), "rows": n})
        return n

    def _destroy_all(self, works) -> None:
        """Overwrite through each descriptor, unlink each name after re-checking it, one directory fsync."""
        held = [w.opened for w in works if w.opened is not None]
        self._each(self.inbox.overwrite, held)  # fsync releases the GIL: overwrites overlap
        for w in works:
            w.out.removed = self.inbox.unlink_checked(w.name, w.opened, expect=w.lst)
        # Closing the last descriptor of an unlinked file frees its blocks: also worth overlapping.
        self._each(lambda o: o.close(), held)
        for w in works:
            w.opened = None
        self.inbox.fsync()
        t = time.time()
        for w in works:
            w.out.destroyed_at = t
            w.out.exposure_s = round(max(0.0, t - w.out.complete_at), 6)

    def _each(self, fn, items) -> None:
        if len(items) > 1 and self.workers > 1:
            list(self._pool().map(fn, items))
        else:
            for x in items:
                fn(x)

    def _pool(self):
        if self._executor is None:
            from concurrent.futures import ThreadPoolExecutor

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
        for item, entry in open_items(self.ledger).items():
            if item in self.seen_items:
                continue
            complete_at = float(entry.get("complete_at") or started_at)
            self.ledger.append("destroyed", item=item, kind=entry.get("kind", "unknown"),
                               complete_at=complete_at,
                               exposure_s=round(max(0.0, started_at - complete_at), 6))
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


# -- reports --------------------------------------------------------------------
def exposure_stats(values) -> dict:
    """``{"n", "median_s", "p95_s", "max_s"}`` rounded to 0.1 ms; empty: None.

    The same statistics as the ledger verifier's (:func:`agent.stats.exposure_summary`,
    Hyndman and Fan type 7), so ``lethe status`` and ``lethe audit verify`` agree.
    """
    st = exposure_summary(values)
    return {k: (round(v, 4) if isinstance(v, float) else v) for k, v in st.items()}


@dataclass
class DrainReport:
    """Counts of one drain by kind, rejections by reason, exposure statistics.

    ``errors`` and ``skipped`` name files: show them to the participant, never persist them.
    """

    received: dict = field(default_factory=dict)
    featurised: dict = field(default_factory=dict)
    duplicate: dict = field(default_factory=dict)
    rejected: dict = field(default_factory=dict)
    destroyed: dict = field(default_factory=dict)
    reasons: dict = field(default_factory=dict)
    rows: int = 0
    n_samples: dict = field(default_factory=dict)
    exposure: dict = field(default_factory=dict)
    over_limit: int = 0
    recovered: int = 0
    errors: list = field(default_factory=list)
    skipped: list = field(default_factory=list)
    seconds: float = 0.0
    raw_seconds: float = 0.0

    @classmethod
    def from_outcomes(cls, outcomes, raw_seconds: float, **kw) -> "DrainReport":
        rec, fea, dup, rej, des, why = (Counter() for _ in range(6))
        samples = Counter()
        rows = 0
        for o in outcomes:
            rec[o.kind] += 1
            {"featurised": fea, "duplicate": dup, "rejected": rej}[o.status][o.kind] += 1
            if o.status == "rejected":
                why[o.reason] += 1
            if o.destroyed_at is not None:
                des[o.kind] += 1
            rows += o.rows
            samples[o.kind] += o.n_samples
        exp = [o.exposure_s for o in outcomes]
        return cls(received=dict(rec), featurised=dict(fea), duplicate=dict(dup), rejected=dict(rej),
                   destroyed=dict(des), reasons=dict(why), rows=rows, n_samples=dict(samples),
                   exposure=exposure_stats(exp),
                   over_limit=sum(1 for x in exp if x is not None and x > raw_seconds),
                   errors=[o.error for o in outcomes if o.error], raw_seconds=raw_seconds, **kw)

    def total(self, which: str) -> int:
        return sum(getattr(self, which).values())

    def as_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}

    def text(self) -> str:
        def by_kind(d):
            return ", ".join(f"{k} {d[k]}" for k in sorted(d)) or "none"

        e = self.exposure
        lines = [
            f"received {self.total('received')} ({by_kind(self.received)})",
            f"featurised {self.total('featurised')} ({by_kind(self.featurised)}), "
            f"{self.total('duplicate')} already kept, {self.rows} feature rows written",
            f"rejected {self.total('rejected')} ({by_kind(self.reasons)})",
            f"destroyed {self.total('destroyed')} ({by_kind(self.destroyed)})",
        ]
        if e.get("n"):
            lines.append(f"raw exposure: median {e['median_s']:.3f} s, p95 {e['p95_s']:.3f} s, "
                         f"max {e['max_s']:.3f} s (limit {self.raw_seconds:g} s; "
                         f"{self.over_limit} over the limit)")
        if self.recovered:
            lines.append(f"closed {self.recovered} item(s) left open by an interrupted run")
        for s in self.skipped:
            lines.append(f"skipped: {s}")
        for err in self.errors:
            lines.append(err)
        lines.append(f"took {self.seconds:.2f} s")
        return "\n".join(lines)


def drain(home, policy, now: float | None = None, *, settle_s: float | None = None,
          intake: Intake | None = None, on_outcome=None) -> DrainReport:
    """Process everything in the inbox, oldest deadline first, until it holds none of our files.

    Files still being written (modified within ``settle_s``) are waited for;
    files that arrive during the drain are taken too.  Subdirectories are
    reported, never entered.  Does not take the home lock: :func:`run_agent`
    and ``lethe run`` do.

    Parameters
    ----------
    home : Home or path-like
    policy : agent.policy.Policy
    now : float, optional
        Simulated clock passed to the readers (see :class:`Intake`).
    settle_s : float, optional
        Overrides ``policy.retention.settle_seconds``.
    """
    t0 = time.time()
    own = intake is None
    if own:
        intake = Intake(home, policy, now=now)
    outcomes, skipped = [], {}
    stuck = 0
    try:
        while True:
            ready, settling, dirs = intake.scan(settle_s=settle_s)
            for name, why in dirs:
                skipped[name] = f"{intake.inbox.display(name)}: {why}; never entered nor removed"
            groups = ([c.name for c in g] for g in batches(ready, intake.inbox.max_file_bytes))
            got = intake.process_groups(groups, on_outcome=on_outcome)
            outcomes += got
            if not ready and not settling:
                break
            stuck = stuck + 1 if ready and not got else 0
            if stuck >= STUCK_PASSES:
                # Something keeps failing (a full disk, a broken ledger): report instead of spinning.
                for c in ready:
                    skipped[c.name] = (f"{intake.inbox.display(c.name)}: could not be processed in "
                                       f"{STUCK_PASSES} passes; see the agent log")
                break
            if stuck:
                time.sleep(0.1 * stuck)
            if not ready:
                wait = min(max(0.0, float(settle_s if settle_s is not None else
                                          policy.retention.settle_seconds)), 1.0)
                time.sleep(max(wait / 4, 0.01))  # waiting for a writer to finish: short and bounded
        recovered = intake.reconcile(t0)
    finally:
        if own:
            intake.close()
    return DrainReport.from_outcomes(outcomes, float(policy.retention.raw_seconds),
                                     skipped=sorted(skipped.values()), recovered=recovered,
                                     seconds=round(time.time() - t0, 3))


BATCH_FILES = 32            # files taken together in a backfill
STUCK_PASSES = 3            # drain passes without progress before it gives up and reports
BATCH_BYTES = 32 << 20      # and at most this many raw bytes in memory at once


def batches(candidates, max_file_bytes: int, max_files: int = BATCH_FILES, max_bytes: int = BATCH_BYTES):
    """Split deadline-ordered candidates into groups for :meth:`Intake.process_many`."""
    group, size = [], 0
    for c in candidates:
        n = min(int(c.lst.st_size), int(max_file_bytes))
        if group and (len(group) >= max_files or size + n > max_bytes):
            yield group
            group, size = [], 0
        group.append(c)
        size += n
    if group:
        yield group


def _process_safely(intake: Intake, names, outcomes: list) -> list:
    try:
        outs = intake.process_many(names)
    except (OSError, ValueError) as e:
        if len(names) > 1:  # find the one that fails; the others go through
            outs = []
            for n in names:
                outs += _process_safely(intake, [n], [])
        else:
            # The agent keeps running; the name is shown on the terminal, not logged.
            log.error("intake_error name#=%s error=%s", intake.name_tag(names[0]), type(e).__name__)
            outs = []
    outcomes.extend(outs)
    return outs


def intake_counts(home, policy=None, now: float | None = None) -> dict:
    """Ledger-derived counts for ``lethe status``, plus the inbox's current raw files.

    Returns
    -------
    dict
        ``{"received": {kind: n}, "featurised": {...}, "rejected": {...},
        "destroyed": {...}, "reasons": {reason: n}, "exposure": {...},
        "inbox": {"files": n, "oldest_age_s": float | None, "limit_s": float,
        "subdirectories": n}}``.
        Reads the ledger without a signing key and lists the inbox without
        opening any file.
    """
    from ..ledger import Ledger

    h = home if isinstance(home, Home) else Home(home)
    counts = {k: defaultdict(int) for k in ("received", "featurised", "rejected", "destroyed")}
    reasons: Counter = Counter()
    exp = []
    if h.ledger_path.exists():
        # The ledger's running state: its last signed checkpoint plus the entries after it.
        state = Ledger(h, signing_key=None).state()
        for kind, per in state.kinds.items():
            for ev, n in per.items():
                if n:
                    counts[ev][kind] += n
        reasons.update(state.reasons)
        exp = state.exposures()  # millisecond resolution
    now = time.time() if now is None else float(now)
    files, subdirs, oldest = 0, 0, None
    try:
        with os.scandir(h.inbox) as it:
            for d in it:
                if ignored(d.name):
                    continue
                try:
                    st = d.stat(follow_symlinks=False)
                except FileNotFoundError:
                    continue
                if stat.S_ISDIR(st.st_mode):
                    subdirs += 1  # never entered nor removed; reported so the participant can look
                    continue
                files += 1
                age = now - max(st.st_mtime, st.st_ctime)
                oldest = age if oldest is None else max(oldest, age)
    except FileNotFoundError:
        pass
    if policy is None:
        try:
            policy = h.load_policy()
        except Exception:
            policy = None
    limit = float(policy.retention.raw_seconds) if policy is not None else None
    out = {k: dict(v) for k, v in counts.items()}
    out.update(reasons=dict(reasons), exposure=exposure_stats(exp),
               inbox={"files": files, "oldest_age_s": None if oldest is None else round(max(oldest, 0.0), 3),
                      "limit_s": limit, "subdirectories": subdirs})
    return out
