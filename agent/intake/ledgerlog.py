"""Intake's writer in front of the ledger: destruction never waits for bookkeeping.

The ledger (``agent/ledger/``) is used through its public API only
(``Ledger.append_many``, ``Ledger.entries``).  When an append fails -- the disk
is full, the ledger's last line is damaged, its anchor cannot be written --
intake does *not* stop: the entries are kept in order in a pending list, the
files are destroyed on time all the same, an integrity alarm is raised, and
the pending entries are appended as soon as the ledger takes them again, with
retries backing off (0.5 s doubling to 60 s) instead of spinning.

Terminology
-----------
pending list
    Entries not yet in the ledger: in memory, and copied (best effort) to
    ``HOME/state/ledger-pending.json`` so a restart appends them too.  On a
    full disk the copy may fail; entries only in memory are lost if the agent
    is killed before the disk frees up (the alarm says so).  Appended later,
    an entry's ``t`` is the time of the append; its ``exposure_s`` is the
    value measured at destruction.
integrity alarm
    ``HOME/state/intake-alarm.json`` = ``{"reason", "error", "since", "pending"}``,
    shown by ``lethe status``; removed once the pending list is empty.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import threading
import time

from ..errors import LetheError

log = logging.getLogger("lethe.intake")

BACKOFF_MIN_S = 0.5
BACKOFF_MAX_S = 60.0
PENDING_NAME = "ledger-pending.json"
ALARM_NAME = "intake-alarm.json"


class LedgerWriter:
    """Append to the ledger, or keep the entries pending (see the module docstring).

    Parameters
    ----------
    home : agent.home.Home
    ledger : agent.ledger.Ledger
        Opened with the device key.
    clock : callable
        Monotonic seconds, for the back-off.
    """

    def __init__(self, home, ledger, clock=time.monotonic):
        self.home = home
        self.ledger = ledger
        self.clock = clock
        self.pending: list[tuple[str, dict]] = self._load()
        self.backoff_s = 0.0
        self.next_try = 0.0
        self.failures = 0
        self.alarmed: str | None = None
        self._lock = threading.RLock()   # the front and the commit thread both write
        self._known: tuple | None = None   # ((inode, size) of the ledger after our last append, its last seq)

    # -- writing ---------------------------------------------------------------
    def write(self, steps) -> bool:
        """Queue ``[(event, fields), ...]`` and append everything pending; True if all are in the ledger.

        Raises only ``ValueError`` (a malformed event: a programming error).
        """
        steps = list(steps)
        if steps:
            from ..ledger import check_fields

            for event, fields in steps:
                _, problems = check_fields(event, dict(fields))
                if problems:
                    raise ValueError(f"ledger: {'; '.join(problems)}")
        with self._lock:
            self.pending.extend(steps)
            return self.flush()

    def flush(self, force: bool = False) -> bool:
        """Append the pending entries unless backing off; True when none is left."""
        with self._lock:
            return self._flush(force)

    def _flush(self, force: bool) -> bool:
        if not self.pending:
            return True
        if not force and self.clock() < self.next_try:
            self._persist()
            return False
        before = self._seq_before()
        try:
            out = self.ledger.append_many(self.pending)
        except (OSError, LetheError) as e:
            self._known = None
            # The entries may be in while a later step failed (the anchor or checkpoint on a full
            # disk): drop from the pending list what the ledger's head shows was appended.
            after = self._head_seq()
            if before is not None and after is not None and after > before:
                del self.pending[:after - before]
            self.failures += 1
            self.backoff_s = min(BACKOFF_MAX_S, max(BACKOFF_MIN_S, self.backoff_s * 2))
            self.next_try = self.clock() + self.backoff_s
            self.alarm("ledger_unwritable", e)
            self._persist()
            return False
        self._remember(out)
        self.pending = []
        self.backoff_s = 0.0
        self.next_try = 0.0
        self._clear()
        return True

    def _seq_before(self) -> int | None:
        """The ledger's last seq before an append: remembered from our own last append while the file
        has not changed since (no other process appended), else read (the ledger's running state)."""
        try:
            st = os.stat(self.ledger.path)
        except (OSError, AttributeError):
            return self._head_seq()
        if self._known is not None and self._known[0] == (st.st_ino, st.st_size):
            return self._known[1]
        return self._head_seq()

    def _remember(self, out) -> None:
        try:
            st = os.stat(self.ledger.path)
            self._known = ((st.st_ino, st.st_size), int(out[-1]["seq"])) if out else None
        except (OSError, AttributeError, KeyError, TypeError, ValueError, IndexError):
            self._known = None

    def _head_seq(self) -> int | None:
        try:
            return int(self.ledger.head()["seq"])
        except (OSError, LetheError, ValueError, KeyError, TypeError):
            return None

    def wait_s(self) -> float | None:
        """Seconds until the next retry, or None when nothing is pending."""
        if not self.pending:
            return None
        return max(0.0, self.next_try - self.clock())

    # -- the alarm ---------------------------------------------------------------
    def alarm(self, reason: str, error: BaseException) -> None:
        """Raise (log and record) an integrity alarm; logged once per reason until cleared."""
        what = type(error).__name__
        errno_ = getattr(error, "errno", None)
        if errno_:
            what += f"/{os.strerror(errno_)}"
        if self.alarmed != reason:
            log.error("integrity_alarm reason=%s error=%s pending=%d: destruction goes on; entries are "
                      "appended when the ledger takes them again", reason, what, len(self.pending))
        self.alarmed = reason
        doc = {"reason": reason, "error": what, "since": time.time(), "pending": len(self.pending)}
        _write_state(self.home.state / ALARM_NAME, doc)

    # -- persistence -------------------------------------------------------------
    def _persist(self) -> None:
        _write_state(self.home.state / PENDING_NAME, [[e, f] for e, f in self.pending])

    def _load(self) -> list[tuple[str, dict]]:
        try:
            doc = json.loads((self.home.state / PENDING_NAME).read_text("utf-8"))
        except (OSError, ValueError):
            return []
        if not isinstance(doc, list):
            return []
        return [(e, f) for e, f in (x for x in doc if isinstance(x, list) and len(x) == 2)
                if isinstance(e, str) and isinstance(f, dict)]

    def _clear(self) -> None:
        for name in (PENDING_NAME, ALARM_NAME):
            with contextlib.suppress(OSError):
                os.unlink(self.home.state / name)
        self.alarmed = None


def read_alarm(home) -> dict | None:
    """The current integrity alarm of intake, or None."""
    try:
        doc = json.loads((home.state / ALARM_NAME).read_text("utf-8"))
    except (OSError, ValueError):
        return None
    return doc if isinstance(doc, dict) else None


def _write_state(path, doc) -> None:
    """Best effort: on a full disk this fails quietly (the alarm is also in memory and the log)."""
    from ..fsutil import write_private

    with contextlib.suppress(OSError):
        write_private(path, json.dumps(doc, sort_keys=True).encode())


PARSING_NAME = "parsing.log"


class ParseMarks:
    """Which items a reader was parsing when the process died: ``HOME/state/parsing.log``.

    ``+item`` is appended before a file is parsed and ``-item`` after, each
    with one ``write`` and no fsync: written data survive the death of the
    process (SIGKILL, a native crash, the OOM killer), which is what this is
    for; a power loss may forget a mark.  At start the outstanding ``+`` marks
    are counted per item (:attr:`counts`: lives that died while parsing it)
    and the file is rewritten with only those.  An item at
    :data:`agent.intake.pipeline.TAKEN_LIMIT` is destroyed unparsed.
    """

    def __init__(self, home):
        self.path = home.state / PARSING_NAME
        self.counts: dict[str, int] = {}
        try:
            text = self.path.read_text("ascii", errors="replace")
        except OSError:
            text = ""
        self.tags: dict[str, str] = {}           # item -> keyed name tag (never the name)
        live: dict[str, int] = {}
        for line in text.splitlines():
            tag, body = line[:1], line[1:].split(" ")
            item = body[0]
            if len(body) > 1 and tag in "=+":
                self.tags[item] = body[-1]
            if tag == "=" and len(body) >= 2 and body[1].isdigit():   # deaths counted by an earlier start
                self.counts[item] = self.counts.get(item, 0) + int(body[1])
            elif tag == "+":
                live[item] = live.get(item, 0) + 1
            elif tag == "-" and live.get(item):
                live[item] -= 1
                self.counts.pop(item, None)     # a parse of it finished: not a file that kills us
        for item, n in live.items():
            if n > 0:
                self.counts[item] = self.counts.get(item, 0) + n
        self.suspect_tags = {self.tags[i] for i in self.counts if i in self.tags}
        self._lock = threading.Lock()
        self.fd = -1
        try:
            from ..fsutil import write_private

            write_private(self.path, "".join(f"={i} {n} {self.tags.get(i, '-')}\n"
                                             for i, n in self.counts.items()).encode("ascii"))
            self.fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_NOFOLLOW | getattr(os, "O_CLOEXEC", 0))
        except OSError:
            self.fd = -1   # a full disk: marks are not kept (the alarm covers the ledger side)

    def begin(self, item: str, tag: str = "-") -> None:
        self._mark(f"+{item} {tag}\n")

    def end(self, item: str, tag: str = "-") -> None:
        self._mark(f"-{item} {tag}\n")
        self.counts.pop(item, None)

    def _mark(self, line: str) -> None:
        if self.fd < 0:
            return
        with self._lock, contextlib.suppress(OSError):
            os.write(self.fd, line.encode("ascii"))

    def close(self) -> None:
        if self.fd >= 0:
            os.close(self.fd)
            self.fd = -1
