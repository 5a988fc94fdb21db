"""``lethe run``: watch the inbox with the platform's native notifications and take files when complete.

Readiness (``docs/intake.md``, "Readiness"): a file is taken

1. on a close-after-write (watchdog's ``FileClosedEvent``, inotify
   ``IN_CLOSE_WRITE``), unless the close was the agent's own;
2. when renamed into the inbox (``FileMovedEvent`` whose destination is in the
   inbox, including a move in from elsewhere on the same file system);
3. as the portable fallback, when its size, mtime and ctime stay unchanged for
   ``settle_s`` (``retention.settle_seconds``) after the last change seen;
4. at the latest ``retention.raw_seconds / 2`` after it was first seen, even if
   it still changes: a writer that never finishes cannot keep raw data in the
   inbox past the window.

Names ending ``.part`` or starting with ``.`` (and names in hidden folders)
wait for their writer until ``retention.raw_seconds`` after they were first
seen, then are destroyed unread (``partial``, ``hidden``).  Non-regular entries
(symlinks, FIFOs, sockets, devices) cannot be "in progress" and are taken at
once.  Subfolders are watched and walked (never through a link; never
removed).  On start, destructions a killed run had begun are finished, then the
inbox is swept; files already there are taken oldest deadline first.

The main loop blocks on a queue; its only timeouts are the nearest settle or
retention deadline of a pending file, so an empty inbox costs no CPU.
"""

from __future__ import annotations

from typing import Any

import contextlib
import logging
import os
import queue
import stat
import threading
import time
from dataclasses import dataclass, field

from .drain import process_safely
from .item import classify
from .pipeline import Intake
from .report import DrainReport
from .report import ReportBuilder
from .scan import unfinished_reason, walk

log = logging.getLogger("lethe.intake")

_STOP = ("stop", "")


@dataclass
class Pending:
    first_seen: float
    sig: tuple
    due: float
    ready: bool = False
    forced_at: float = field(default=0.0)
    unfinished: bool = False   # .part or hidden: ready only when the window has passed


def _sig(st: os.stat_result) -> tuple:
    return (st.st_size, st.st_mtime_ns, st.st_ctime_ns, st.st_ino)


class _Handler:
    """watchdog event handler: turns events on top-level inbox names into ``(what, name)`` messages."""

    def __init__(self, inbox: str, q: queue.Queue):
        self.inbox = os.path.normpath(os.fspath(inbox))
        self.q = q

    def _name(self, path) -> str | None:
        """The inbox-relative name of an event's path (any depth), or None when outside the inbox."""
        if not path:
            return None
        path = os.path.normpath(os.fsdecode(path))
        if not path.startswith(self.inbox + os.sep):
            return None
        rel = path[len(self.inbox) + 1:]
        return rel if rel and ".." not in rel.split(os.sep) else None

    def dispatch(self, event) -> None:
        from watchdog.events import (DirCreatedEvent, DirMovedEvent, FileClosedEvent, FileCreatedEvent,
                                     FileDeletedEvent, FileModifiedEvent, FileMovedEvent)

        if isinstance(event, FileMovedEvent):
            src, dest = self._name(event.src_path), self._name(event.dest_path)
            if src:
                self.q.put(("gone", src))
            if dest:
                self.q.put(("moved", dest))
        elif isinstance(event, FileClosedEvent):
            name = self._name(event.src_path)
            if name:
                self.q.put(("closed", name))
        elif isinstance(event, (FileCreatedEvent, FileModifiedEvent)):
            name = self._name(event.src_path)
            if name:
                self.q.put(("changed", name))
        elif isinstance(event, FileDeletedEvent):
            name = self._name(event.src_path)
            if name:
                self.q.put(("gone", name))
        elif isinstance(event, (DirCreatedEvent, DirMovedEvent)):
            name = self._name(getattr(event, "dest_path", "") or event.src_path)
            if name:
                self.q.put(("dir", name))


class InboxWatcher:
    """The event loop of the agent.

    Parameters
    ----------
    intake : agent.intake.pipeline.Intake
        The per-file pipeline (holds the inbox descriptor, vault and ledger).
    settle_s : float, optional
        Overrides ``policy.retention.settle_seconds``.
    stop_event : threading.Event, optional
        Set it (from any thread or a signal handler) to stop the loop.
    clock : callable
        Returns Unix seconds; tests may pass a fake.
    """

    def __init__(self, intake: Intake, settle_s: float | None = None, stop_event: threading.Event | None = None,
                 on_outcome=None, after_sweep=None, maintenance=None, maintenance_every_s: float = 3600.0):
        policy = intake.policy
        self.after_sweep = after_sweep
        # Periodic work between files (coding features into IDs, building episodes):
        # one wake-up per interval, so an idle agent still sleeps almost all the time.
        self.maintenance = maintenance
        self.maintenance_every_s = float(maintenance_every_s)
        self.next_maintenance = time.time() + self.maintenance_every_s
        # Exact GPS fixes are pruned by the clock, not only when a newer fix arrives.
        self.prune_every_s = max(60.0, float(policy.retention.gps_buffer_minutes) * 60.0 / 4.0)
        self.next_prune = time.time()
        self.intake = intake
        self.settle_s = float(policy.retention.settle_seconds if settle_s is None else settle_s)
        if self.settle_s < 0:
            raise ValueError(f"settle_s must be >= 0 seconds, got {settle_s!r}")
        self.force_s = float(policy.retention.raw_seconds) / 2.0
        self.stop_event = stop_event or threading.Event()
        self.q: queue.Queue = queue.Queue()
        self.pending: dict[str, Pending] = {}
        self.own_closes: dict[str, int] = {}
        self.dirs_reported: set[str] = set()
        self.outcomes = ReportBuilder(intake.raw_seconds)   # aggregated as files go; nothing per file kept
        self.skipped: list[str] = []
        self.on_outcome = on_outcome
        self.observer: Any = None
        self.wakeups = 0

    # -- lifecycle -------------------------------------------------------------
    def start(self) -> None:
        """Start the observer (before the sweep, so nothing arriving meanwhile is missed)."""
        from watchdog.events import (DirCreatedEvent, DirMovedEvent, FileClosedEvent, FileCreatedEvent,
                                     FileDeletedEvent, FileModifiedEvent, FileMovedEvent)
        from watchdog.observers import Observer

        try:
            observer = Observer(generate_full_events=True)  # type: ignore[call-arg]  # inotify: moves in from outside are moves
        except TypeError:
            observer = Observer()
        handler: Any = _Handler(self.intake.inbox.path, self.q)
        observer.schedule(handler, self.intake.inbox.path, recursive=True,
                          event_filter=[FileClosedEvent, FileMovedEvent, FileCreatedEvent, FileModifiedEvent,
                                        FileDeletedEvent, DirCreatedEvent, DirMovedEvent])
        observer.daemon = True
        observer.start()
        self.observer = observer
        waker = threading.Thread(target=self._wake_on_stop, name="lethe-stop", daemon=True)
        waker.start()

    def _wake_on_stop(self) -> None:
        self.stop_event.wait()
        self.q.put(_STOP)

    def stop(self) -> None:
        self.stop_event.set()
        if self.observer is not None:
            self.observer.stop()
            self.observer.join(timeout=5)
            self.observer = None

    def sweep(self) -> None:
        """Note every entry already in the inbox, subfolders included (at start, and when a folder appears)."""
        for name, _ in walk(self.intake.inbox):
            self._note(name, "sweep")

    # -- the loop ----------------------------------------------------------------
    def run(self) -> DrainReport:
        """Block until stopped, taking files as they become complete; returns the session's report."""
        t0 = time.time()
        if self.observer is None:
            self.start()
        self.intake.finish_leftovers()
        self.sweep()
        self._process_ready()
        self.recovered = self.intake.reconcile(t0)
        self._maybe_prune()
        if self.after_sweep is not None:
            self.after_sweep()
        while not self.stop_event.is_set():
            timeout = self._next_timeout()
            try:
                msg = self.q.get(timeout=timeout)
            except queue.Empty:
                msg = None
            self.wakeups += 1
            if msg == _STOP:
                break
            if msg is not None:
                self._handle(*msg)
            self._drain_queue()  # take everything already queued before working
            self.intake.log.flush()  # entries the ledger could not take yet: retried with back-off
            self._check_pending()
            self._process_ready()
            self._maybe_maintain()
        return self.report(t0)

    def _maybe_prune(self) -> None:
        if not self.intake.gps_buffered or time.time() < self.next_prune:
            return
        self.next_prune = time.time() + self.prune_every_s
        try:
            self.intake.prune_gps()
        except Exception as e:  # noqa: BLE001 - never let pruning stop intake; logged by class
            log.warning("gps prune failed: %s", type(e).__name__)

    def _maybe_maintain(self) -> None:
        self._maybe_prune()
        if self.maintenance is None or time.time() < self.next_maintenance:
            return
        self.next_maintenance = time.time() + self.maintenance_every_s
        try:
            self.maintenance()
        except Exception as e:  # noqa: BLE001 - never let periodic coding stop intake
            log.warning("periodic coding failed: %s", type(e).__name__)

    def report(self, t0: float) -> DrainReport:
        return self.outcomes.report(skipped=list(self.skipped), recovered=getattr(self, "recovered", 0),
                                    seconds=round(time.time() - t0, 3))

    def _next_timeout(self) -> float | None:
        now = time.time()
        soonest = self.next_maintenance if self.maintenance is not None else None
        if self.intake.gps_buffered:   # an idle agent with no fixes buffered never wakes for this
            soonest = self.next_prune if soonest is None else min(soonest, self.next_prune)
        if self.pending:
            files = min(self._due(p) for p in self.pending.values())
            soonest = files if soonest is None else min(soonest, files)
        retry = self.intake.log.wait_s()
        if retry is not None:
            soonest = now + retry if soonest is None else min(soonest, now + retry)
        if soonest is None:
            return None  # nothing to wait for: block until an event
        return max(0.0, soonest - now)

    def _due(self, p: Pending) -> float:
        if p.unfinished:
            return p.first_seen + self.intake.raw_seconds
        return min(p.due, p.first_seen + self.force_s)

    # -- events ------------------------------------------------------------------
    def _handle(self, what: str, name: str) -> None:
        if what == "gone":
            p = self.pending.get(name)
            if p is not None and self.intake.inbox.lstat(name) is None:
                del self.pending[name]
            return
        if what == "closed" and self.own_closes.get(name):
            # The agent's own descriptor closing after destruction: not a writer finishing.
            self.own_closes[name] -= 1
            if not self.own_closes[name]:
                del self.own_closes[name]
            what = "changed"
        self._note(name, what)

    def _note(self, name: str, what: str) -> None:
        why = unfinished_reason(name)
        if why == "leftover":
            return   # our own rename before a destruction
        lst = self.intake.inbox.lstat(name)
        if lst is None:
            self.pending.pop(name, None)
            return
        if stat.S_ISDIR(lst.st_mode):
            if what in ("dir", "moved", "changed") and name not in self.dirs_reported:
                self.dirs_reported.add(name)
                self.sweep()   # a folder arrived (a sync tool's dated folder): take what it holds
            return
        now = time.time()
        p = self.pending.get(name)
        if p is None:
            first = now
            if why is not None:
                first = min(now, max(lst.st_mtime, lst.st_ctime))  # already old when we first look
            p = self.pending[name] = Pending(first_seen=first, sig=_sig(lst), due=now + self.settle_s,
                                             unfinished=why is not None)
        if p.unfinished:
            return       # waits for a rename, or for the window to pass (_check_pending)
        if not stat.S_ISREG(lst.st_mode) or what in ("closed", "moved"):
            p.ready = True
        elif what == "sweep":
            # Already there at start: complete unless it changed within the settle time.
            if now - max(lst.st_mtime, lst.st_ctime) >= self.settle_s:
                p.ready = True
        else:  # a change: restart the settle clock
            p.sig = _sig(lst)
            p.due = now + self.settle_s
            p.ready = False

    def _check_pending(self) -> None:
        now = time.time()
        for name, p in list(self.pending.items()):
            if p.ready:
                continue
            if p.unfinished:
                p.ready = now >= p.first_seen + self.intake.raw_seconds
                continue
            if now >= p.first_seen + self.force_s:
                p.ready = True  # the retention deadline beats an unfinished writer
                continue
            if now < p.due:
                continue
            lst = self.intake.inbox.lstat(name)
            if lst is None:
                del self.pending[name]
                continue
            sig = _sig(lst)
            if sig == p.sig:
                p.ready = True
            else:
                p.sig, p.due = sig, now + self.settle_s

    def _process_ready(self) -> None:
        while True:
            # Oldest deadline first: the file that has existed longest goes next.
            order = []
            for name in [n for n, p in self.pending.items() if p.ready]:
                lst = self.intake.inbox.lstat(name)
                if lst is None:
                    del self.pending[name]
                    continue
                order.append((self.intake.is_suspect(name) and classify(name) != "gps",
                              min(max(lst.st_mtime, lst.st_ctime), self.pending[name].first_seen), name))
            if not order:
                return
            order.sort()
            names = [n for *_, n in order]
            while names:
                size = self.intake.group_files
                group, names = names[:size], names[size:]
                group = [n for n in group if n in self.pending and self.pending[n].ready]
                for n in group:
                    if self.pending[n].unfinished:
                        self.intake.forced.add(n)   # its window passed while we watched it
                    del self.pending[n]
                self._take(group)
                # Events that arrived while working may make other files ready, or change these.
                if not self._drain_queue():
                    return

    def _drain_queue(self) -> bool:
        """Handle every queued event without blocking; False once a stop was asked for."""
        while True:
            try:
                msg = self.q.get_nowait()
            except queue.Empty:
                return True
            if msg == _STOP:
                self.stop_event.set()
                return False
            self._handle(*msg)

    def _take(self, names) -> None:
        outs = process_safely(self.intake, names, self.outcomes)
        done = set()
        for out in outs:
            done.add(out.name)
            if not out.aside:   # renamed aside, our close is reported under the leftover name (ignored)
                self.own_closes[out.name] = self.own_closes.get(out.name, 0) + 1
            if self.on_outcome is not None:
                self.on_outcome(out)
        now = time.time()
        for n in names:
            if n in done or unfinished_reason(n) == "leftover":
                continue
            lst = self.intake.inbox.lstat(n)
            if lst is not None and not stat.S_ISDIR(lst.st_mode):
                # Changed under us: look again after the settle time.
                self.pending[n] = Pending(first_seen=now, sig=_sig(lst), due=now + self.settle_s)


def setup_logging(home) -> logging.Handler | None:
    """Rotating ``HOME/logs/agent.log`` for the ``lethe`` loggers (no content is ever logged)."""
    from logging.handlers import RotatingFileHandler

    from ..home import Home

    h = home if isinstance(home, Home) else Home(home)
    root = logging.getLogger("lethe")
    target = os.path.abspath(h.logs / "agent.log")
    for existing in root.handlers:
        if isinstance(existing, RotatingFileHandler) and existing.baseFilename == target:
            return None  # already logging to this home
    h.logs.mkdir(parents=True, exist_ok=True, mode=0o700)
    old = os.umask(0o077)
    try:
        handler = RotatingFileHandler(target, maxBytes=1 << 20, backupCount=3, encoding="utf-8")
    finally:
        os.umask(old)
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s %(message)s"))
    root.addHandler(handler)
    root.setLevel(logging.INFO)
    return handler


def code_features(intake) -> None:
    """Code the stored features into IDs and build episodes (the agent runs this hourly).

    Features are thereby discarded on schedule (``retention.feature_days``)
    even when nobody runs ``lethe codebook`` by hand.  Skipped while paused.
    """
    from ..codebook import run_codebook
    from ..episodes import build_episodes
    from ..pause import is_paused

    if is_paused(intake.home):
        return
    rep = run_codebook(intake.home, intake.policy, intake.vault, ledger=intake.ledger)
    build_episodes(intake.home, intake.policy, intake.vault)
    log.info("coded: %s", ", ".join(f"{k} {v}" for k, v in sorted(rep.coded.items())) or "nothing")


def run_agent(home, policy, once: bool = False, settle_s: float | None = None,
              stop_event: threading.Event | None = None, *, now: float | None = None, warm: bool = True,
              on_ready=None, on_outcome=None, maintenance_every_s: float = 3600.0) -> DrainReport:
    """Run the intake agent on a home: hold its lock, sweep, then watch (or drain and return).

    Parameters
    ----------
    home : Home or path-like
    policy : agent.policy.Policy
    once : bool
        Drain the inbox (waiting for files still being written) and return.
    settle_s : float, optional
        Overrides ``policy.retention.settle_seconds``.
    stop_event : threading.Event, optional
        Set to stop a watching agent; it then returns its session report.
    now : float, optional
        Simulated clock for the readers (see :class:`~agent.intake.pipeline.Intake`).
    warm : bool
        Watching: call :func:`agent.intake.warm_up` right after the start-up
        sweep (the forked reader children then start with everything loaded).
        ``once`` never warms up separately (the first group does).
    on_ready : callable, optional
        Called with the start-up time in seconds once the agent is ready:
        watching after sweep and warm-up, or (``once``) about to drain.
    maintenance_every_s : float
        Watching: how often the stored features are coded into IDs and
        episodes are built (:func:`code_features`); default hourly.

    Returns
    -------
    DrainReport
    """
    from ..home import Home

    t_start = time.time()
    h = home if isinstance(home, Home) else Home(home)
    handler = setup_logging(h)
    try:
        with h.lock("agent"):
            return _run_locked(h, policy, once, settle_s, stop_event, now, warm, on_ready, on_outcome, t_start,
                               maintenance_every_s)
    finally:
        if handler is not None:
            logging.getLogger("lethe").removeHandler(handler)
            handler.close()


def _run_locked(h, policy, once, settle_s, stop_event, now, warm, on_ready, on_outcome, t_start,
                maintenance_every_s=3600.0):
    from .pipeline import drain

    intake = Intake(h, policy, now=now, isolate=True)   # readers in forked children the agent survives
    try:
        from .. import __version__

        intake.ledger.append("agent_start", version=__version__, mode="once" if once else "watch")

        def warm_and_ready():
            # After the start-up sweep, so files already waiting are not held up by it.
            if warm:
                with contextlib.suppress(ImportError, AttributeError):
                    intake.load_readers()   # the forked reader children start with it all loaded
            if on_ready is not None:
                on_ready(time.time() - t_start)

        if once:
            # A drain warms what it needs on its first file; a separate warm-up would only delay it.
            if on_ready is not None:
                on_ready(time.time() - t_start)
            report = drain(h, policy, now=now, settle_s=settle_s, intake=intake, on_outcome=on_outcome)
        else:
            watcher = InboxWatcher(intake, settle_s=settle_s, stop_event=stop_event, on_outcome=on_outcome,
                                   after_sweep=warm_and_ready, maintenance=lambda: code_features(intake),
                                   maintenance_every_s=maintenance_every_s)
            watcher.start()
            from ..uploader import start_background  # sends prepared files when the card names a server

            uploader_stop = threading.Event()
            start_background(h, uploader_stop)
            try:
                report = watcher.run()
            finally:
                uploader_stop.set()
                watcher.stop()
        intake.ledger.append("agent_stop", reason="drained" if once else "stopped")
        return report
    finally:
        intake.close()
