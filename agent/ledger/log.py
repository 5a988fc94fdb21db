"""The ledger writer: an append-only, hash-chained, signed Merkle log with checkpoints.

See :mod:`agent.ledger` for the terminology and ``docs/ledger.md`` for the
format.  This module appends entries, keeps the running state of the log
(Merkle frontier, event counts, items not yet destroyed) and writes a signed
*checkpoint* of that state every :data:`CHECKPOINT_EVERY` entries, so that
opening a long ledger reads only the entries after the last checkpoint.

A damaged line (not JSON, not an entry) never stops appending: it is counted,
left in place for the verifier, and recorded once by an ``alarm`` entry.
"""

from __future__ import annotations

import errno
import json
import os
import sqlite3
import threading
import time
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

from .. import merkle
from cryptography.exceptions import InvalidSignature

from ..errors import IntegrityError, LetheError, StateError
from ..fsutil import FILE_MODE, fsync_dir, lock_fd
from ..home import Home
from ..canonical import CanonicalJSONError
from .events import (
    ENTRY_VERSION,
    HEX64,
    ZERO_HASH,
    anchor_body,
    entry_hash,
    shape_problem,
    signed_form,
    validate_event,
)

CHECKPOINT_EVERY = 512      # entries between signed checkpoints of the running state
CHECKPOINT_VERSION = 2      # written (RFC 8785 signed form); version 1 (sorted-key JSON) is still read
CHECKPOINT_VERSIONS = (1, 2)
CHECKPOINT_NAME = "ledger.checkpoint"
_READ_BLOCK = 1 << 20
_COUNTED = ("received", "featurised", "rejected", "destroyed")

# What a damaged or foreign key, anchor or checkpoint file can raise.
_BAD = (InvalidSignature, LetheError, ValueError, KeyError, TypeError, AttributeError, OSError)


class LedgerMissingError(IntegrityError):
    """The ledger is gone from a home that holds data; a new one is not started over it."""


# -- running state ---------------------------------------------------------------------

@dataclass
class LogState:
    """What the log holds so far, kept incrementally (the checkpoint's content).

    Attributes
    ----------
    seq, hash : int, str
        The last well-formed entry (-1 and 64 zeros when there is none).
    offset : int
        Bytes of complete lines read so far.
    size : int
        Merkle leaves: well-formed entries, in file order.
    frontier : agent.merkle.Frontier
    origin : str or None
        The entry hash of the log's first entry (its leaf 0).
    counts : dict
        event -> entries.
    kinds : dict
        kind -> {"received", "featurised", "rejected", "destroyed"}.
    reasons : dict
        rejection reason -> count.
    open : dict
        item -> [kind, complete_at, seq] for items received and not yet destroyed.
    exposure_ms : dict
        Recorded ``exposure_s`` of each destruction, rounded to milliseconds -> count.
    taken : dict
        item -> ``received`` entries since its last outcome (``featurised``,
        ``rejected`` or ``destroyed``), for items still without one.
    damaged : int
        Lines that are not ledger entries.
    unrecorded : int
        Damaged lines after the last ``alarm`` entry (the next append records them).
    """

    seq: int = -1
    hash: str = ZERO_HASH
    offset: int = 0
    frontier: merkle.Frontier = field(default_factory=merkle.Frontier)
    origin: str | None = None
    counts: dict = field(default_factory=dict)
    kinds: dict = field(default_factory=dict)
    reasons: dict = field(default_factory=dict)
    open: dict = field(default_factory=dict)
    exposure_ms: dict = field(default_factory=dict)
    taken: dict = field(default_factory=dict)
    damaged: int = 0
    unrecorded: int = 0

    @property
    def size(self) -> int:
        return self.frontier.size

    def root(self) -> str:
        """Hex Merkle tree head over the entries so far (RFC 9162 ``MTH``)."""
        return self.frontier.root().hex()

    def note_damaged(self) -> None:
        self.damaged += 1
        self.unrecorded += 1

    def apply(self, entry: dict, line: bytes) -> None:
        """Account for one well-formed entry whose stored line (no newline) is ``line``."""
        self.frontier.append(merkle.leaf_hash(line))
        if self.origin is None:
            self.origin = entry["hash"]
        self.seq, self.hash = entry["seq"], entry["hash"]
        event = entry["event"]
        self.counts[event] = self.counts.get(event, 0) + 1
        item, kind = entry.get("item"), entry.get("kind")
        if event in _COUNTED and isinstance(kind, str):
            per = self.kinds.get(kind)
            if per is None:
                per = self.kinds[kind] = {k: 0 for k in _COUNTED}
            per[event] += 1
        if isinstance(item, str):
            if event == "received":
                self.taken[item] = self.taken.get(item, 0) + 1
            elif event in ("featurised", "rejected", "destroyed"):
                self.taken.pop(item, None)
        if event == "received" and isinstance(item, str):
            self.open[item] = [kind, entry.get("complete_at"), entry["seq"]]
        elif event == "destroyed" and isinstance(item, str):
            self.open.pop(item, None)
            x = entry.get("exposure_s")
            if isinstance(x, (int, float)) and not isinstance(x, bool):
                key = str(round(float(x) * 1000))
                self.exposure_ms[key] = self.exposure_ms.get(key, 0) + 1
        elif event == "rejected":
            r = entry.get("reason")
            if isinstance(r, str):
                self.reasons[r] = self.reasons.get(r, 0) + 1
        elif event == "alarm":
            self.unrecorded = 0

    def to_dict(self) -> dict:
        return {"seq": self.seq, "hash": self.hash, "offset": self.offset, "size": self.size,
                "frontier": self.frontier.to_list(), "root": self.root(), "origin": self.origin,
                "counts": dict(sorted(self.counts.items())), "kinds": self.kinds, "reasons": self.reasons,
                "open": self.open, "exposure_ms": self.exposure_ms, "taken": self.taken, "damaged": self.damaged,
                "unrecorded": self.unrecorded}

    @classmethod
    def from_dict(cls, d: dict) -> LogState:
        fr = merkle.Frontier.from_list(int(d["size"]), d["frontier"])
        if fr.root().hex() != d["root"]:
            raise ValueError("frontier does not give the stated root")
        return cls(seq=int(d["seq"]), hash=str(d["hash"]), offset=int(d["offset"]), frontier=fr,
                   origin=d["origin"], counts=dict(d["counts"]), kinds={k: dict(v) for k, v in d["kinds"].items()},
                   reasons=dict(d["reasons"]), open={k: list(v) for k, v in d["open"].items()},
                   exposure_ms=dict(d["exposure_ms"]), taken=dict(d["taken"]), damaged=int(d["damaged"]),
                   unrecorded=int(d["unrecorded"]))

    def copy(self) -> LogState:
        return LogState.from_dict(json.loads(json.dumps(self.to_dict())))

    def exposures(self) -> list[float]:
        """The recorded exposures in seconds (millisecond resolution), sorted."""
        out: list[float] = []
        for k, n in sorted(self.exposure_ms.items(), key=lambda kv: int(kv[0])):
            out.extend([int(k) / 1000.0] * n)
        return out


def parse_line(line: bytes) -> dict | None:
    """The entry on ``line`` (no newline), or None when it is not a well-formed entry."""
    try:
        entry = json.loads(line)
    except (ValueError, UnicodeDecodeError):
        return None
    if shape_problem(entry) is not None:
        return None
    return entry


def checkpoint_body(state: dict, version: int = CHECKPOINT_VERSION) -> bytes:
    """The bytes a checkpoint's signature covers (``version`` 1: sorted-key JSON; 2: RFC 8785)."""
    if version not in CHECKPOINT_VERSIONS:
        raise ValueError(f"checkpoint version {version!r} is not supported")
    return signed_form({"v": version, "state": state}, version)


def read_checkpoint(path: Path, public_key) -> dict | None:
    """The checkpoint's state when its signature verifies with ``public_key``, else None."""
    try:
        doc = json.loads(path.read_text("utf-8"))
        v = doc.get("v")
        if isinstance(v, bool) or v not in CHECKPOINT_VERSIONS:
            return None
        public_key.verify(bytes.fromhex(doc["sig"]), checkpoint_body(doc["state"], v))
        return doc["state"]
    except _BAD:  # absent, damaged or not ours: the caller reads from the start
        return None


# -- locks and paths -------------------------------------------------------------------

# One lock per ledger file for the whole process: several Ledger objects on the
# same file (intake threads, a pause command) must not interleave appends.
_LOCKS: dict[str, threading.Lock] = {}
_LOCKS_GUARD = threading.Lock()


def _path_lock(path: Path) -> threading.Lock:
    key = os.path.realpath(path)
    with _LOCKS_GUARD:
        return _LOCKS.setdefault(key, threading.Lock())


def resolve_paths(home_or_path) -> tuple[Path, Path, Path]:
    """(ledger file, anchor file, home root) for a home, a home path or a ledger path."""
    if isinstance(home_or_path, Home):
        return home_or_path.ledger_path, home_or_path.ledger_head_path, home_or_path.root
    p = Path(home_or_path if home_or_path is not None else Home().root)
    if p.is_dir():
        h = Home(p)
        return h.ledger_path, h.ledger_head_path, h.root
    return p, p.with_suffix(".head"), p.parent


def home_holds_data(root: Path) -> list[str]:
    """What in the home shows it has been in use (empty when it holds nothing yet).

    Checked before a new ledger is started: vault records, an enrolment, an
    outbox with bundles, a ledger checkpoint.
    """
    found = []
    try:
        cfg = json.loads((root / "state" / "home.json").read_text("utf-8"))
        if isinstance(cfg, dict) and cfg.get("log_origin"):
            found.append("an enrolment (state/home.json)")
    except (OSError, ValueError):
        pass
    if (root / "enrolment.json").exists():
        found.append("an enrolment file")
    vault = root / "vault.db"
    if vault.exists():
        try:
            db = sqlite3.connect(f"file:{vault}?mode=ro", uri=True)
            try:
                if db.execute("SELECT 1 FROM records LIMIT 1").fetchone():
                    found.append("vault records")
            finally:
                db.close()
        except sqlite3.Error:
            found.append("a vault file")
    try:
        if any(True for _ in (root / "outbox").iterdir()):
            found.append("outbox files")
    except OSError:
        pass
    if (root / CHECKPOINT_NAME).exists():
        found.append("a ledger checkpoint")
    return found


# -- the writer ------------------------------------------------------------------------

class Ledger:
    """The home's ledger.

    Parameters
    ----------
    home : Home or path-like
        The lethe home.
    signing_key : Ed25519PrivateKey, optional
        The device key; without it the ledger is read-only.
    clock : callable, optional
        Returns Unix seconds for ``t``; defaults to :func:`time.time`
        (tests and simulations inject their own).

    Notes
    -----
    Appending never fails because of earlier damage: a line that is not an
    entry is skipped (and counted in :attr:`damaged`), a torn last line is
    repaired, and the first append after new damage records an ``alarm``
    entry.  Appending does fail (:class:`LedgerMissingError`) when the ledger
    file is missing or empty in a home that already holds data: the device
    does not quietly start a new log.
    """

    def __init__(self, home=None, signing_key=None, *, clock: Callable[[], float] | None = None):
        self.path, self.anchor_path, self.root = resolve_paths(home if home is not None else Home())
        self.checkpoint_path = self.path.with_name(CHECKPOINT_NAME)
        self._key = signing_key
        self._clock = clock or time.time
        self._lock = _path_lock(self.path)
        self._state: LogState | None = None
        self._tail: tuple[int, int] | None = None  # (inode, size) the state was read up to
        self._torn = b""  # an incomplete last line found by that read (repaired by the next append)
        self._damaged_seen = 0
        self._reloaded = False  # the last _sync did not continue from this object's own appends

    def __repr__(self):
        return f"Ledger({str(self.path)!r}{'' if self._key else ', read-only'})"

    # -- state ---------------------------------------------------------------------
    def _public_key(self):
        if self._key is not None:
            return self._key.public_key()
        from ..keystore import read_device_public

        try:
            return read_device_public(self.root / "keys")
        except _BAD:
            return None

    def _sync(self, fd) -> tuple[LogState, bytes]:
        """Bring the running state up to the file's end; returns (state, torn tail bytes)."""
        st = os.fstat(fd)
        if self._state is not None and self._tail == (st.st_ino, st.st_size):
            return self._state, self._torn  # a torn tail seen by a read stays to be repaired
        self._reloaded = True
        state = None
        if self._state is not None and self._tail and self._tail[0] == st.st_ino \
                and self._state.offset <= st.st_size and self._line_ends_with(fd, self._state):
            state = self._state  # the same file grew (another writer): read on from where we were
        if state is None:
            pub = self._public_key()
            cp = read_checkpoint(self.checkpoint_path, pub) if pub is not None else None
            if cp is not None:
                try:
                    cand = LogState.from_dict(cp)
                    if cand.offset <= st.st_size and self._line_ends_with(fd, cand):
                        state = cand
                except (KeyError, TypeError, ValueError):
                    state = None
        if state is None:
            state = LogState()
        torn = self._replay(fd, state, st.st_size)
        self._state = state
        self._tail = (st.st_ino, st.st_size)
        self._torn = torn
        return state, torn

    def _line_ends_with(self, fd, state: LogState) -> bool:
        """Whether the line that ends at ``state.offset`` is the entry ``state.seq``."""
        if state.offset == 0:
            return state.seq == -1
        start = max(0, state.offset - 65536)
        data = os.pread(fd, state.offset - start, start)
        if not data.endswith(b"\n"):
            return False
        begin = data.rfind(b"\n", 0, len(data) - 1) + 1
        entry = parse_line(data[begin:-1])
        return entry is not None and entry["seq"] == state.seq and entry["hash"] == state.hash

    def _replay(self, fd, state: LogState, size: int) -> bytes:
        pos, rest = state.offset, b""
        while pos < size:
            chunk = os.pread(fd, min(_READ_BLOCK, size - pos), pos)
            if not chunk:
                break
            pos += len(chunk)
            data = rest + chunk
            lines = data.split(b"\n")
            rest = lines.pop()
            for line in lines:
                state.offset += len(line) + 1
                entry = parse_line(line)
                if entry is None:
                    state.note_damaged()
                else:
                    state.apply(entry, line)
        return rest

    def state(self) -> LogState:
        """A copy of the running state (reads only the entries after the last checkpoint)."""
        with self._lock:
            try:
                fd = os.open(self.path, os.O_RDONLY | os.O_NOFOLLOW)
            except FileNotFoundError:
                return LogState()
            try:
                state, _torn = self._sync(fd)
                return state.copy()
            finally:
                os.close(fd)

    @property
    def damaged(self) -> int:
        """Lines in the ledger that are not entries (0 for an undamaged ledger)."""
        return max(self.state().damaged, self._damaged_seen)

    def taken_counts(self) -> dict[str, int]:
        """``{item: received entries since its last outcome}`` for items still without one.

        From the running state (checkpoint plus the entries after it), so a
        start-up that needs it does not re-read the whole ledger.
        """
        return dict(self.state().taken)

    def open_items(self) -> dict[str, dict]:
        """Items received and not yet destroyed: ``{item: {"kind", "complete_at", "seq"}}``."""
        return {k: {"kind": v[0], "complete_at": v[1], "seq": v[2]} for k, v in self.state().open.items()}

    # -- appending -------------------------------------------------------------------
    def append(self, event: str, **fields) -> dict:
        """Append one signed entry durably and return it.

        Raises
        ------
        ValueError
            For an unknown event, an unknown field or a field of the wrong type
            (a programming error, never data dependent).
        LedgerMissingError
            The ledger is missing or empty in a home that holds data.
        """
        return self.append_many([(event, fields)])[-1]

    def append_many(self, events: Iterable[tuple[str, dict]]) -> list[dict]:
        """Append several entries with one write and one fsync; returns them in order.

        Every event is checked against the ledger-entry contract first; one
        invalid event refuses the whole group (:class:`~agent.ledger.events.EventError`,
        a ``ValueError``) and nothing is written.
        """
        checked = [(event, validate_event(event, fields)) for event, fields in events]
        if not checked:
            return []
        if self._key is None:
            raise StateError(f"{self.path}: this ledger was opened read-only (no signing key)")
        with self._lock:
            created = not self.path.exists()
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_APPEND | os.O_NOFOLLOW, FILE_MODE)
            try:
                lock_fd(fd)  # other processes (pause, withdraw) append too
                self._reloaded = False
                state, torn = self._sync(fd)
                if os.fstat(fd).st_size == 0:
                    found = home_holds_data(self.root)
                    if found:
                        raise LedgerMissingError(
                            f"{self.path}: the ledger is missing or empty but this home holds "
                            f"{', '.join(found)}; refusing to start a new ledger over it "
                            f"(run 'lethe audit verify')")
                if torn:
                    whole = self._whole_torn(torn, state)
                    if whole is not None:
                        # The torn tail is a complete entry missing only its
                        # newline: keep it rather than lose, say, a destruction.
                        _write_all(fd, b"\n")
                        state.offset += len(torn) + 1
                        state.apply(whole, torn)
                    else:
                        os.ftruncate(fd, state.offset)
                        os.fsync(fd)
                        checked.insert(0, ("repaired", {"dropped_bytes": len(torn)}))
                if state.unrecorded:
                    checked.insert(0, ("alarm", {"check": "damaged_line", "lines": state.unrecorded}))
                seq, prev = state.seq, state.hash
                if self._reloaded:
                    seq, prev = self._continue_after_anchor(seq, prev)
                out, lines = [], []
                for event, norm in checked:
                    seq += 1
                    entry = {"v": ENTRY_VERSION, "seq": seq, "prev": prev, "t": float(self._clock()),
                             "event": event, **norm}
                    entry["hash"] = entry_hash(entry)
                    entry["sig"] = self._key.sign(bytes.fromhex(entry["hash"])).hex()
                    prev = entry["hash"]
                    line = json.dumps(entry, separators=(",", ":"), ensure_ascii=False,
                                      allow_nan=False).encode("utf-8")
                    lines.append(line)
                    out.append(entry)
                before = state.size // CHECKPOINT_EVERY
                _write_all(fd, b"".join(x + b"\n" for x in lines))
                os.fsync(fd)
                for entry, line in zip(out, lines, strict=True):
                    state.offset += len(line) + 1
                    state.apply(entry, line)
                st = os.fstat(fd)
                self._tail, self._torn = (st.st_ino, st.st_size), b""
                self._write_anchor(seq, prev)
                if state.size // CHECKPOINT_EVERY != before:
                    self._write_checkpoint(state)
            except BaseException:
                self._state, self._tail, self._torn = None, None, b""  # re-read on the next call
                raise
            finally:
                os.close(fd)
            if created:
                fsync_dir(self.path.parent)
        return out

    def checkpoint(self) -> None:
        """Write a signed checkpoint of the running state now (e.g. when the agent stops)."""
        if self._key is None:
            raise StateError(f"{self.path}: this ledger was opened read-only (no signing key)")
        with self._lock:
            try:
                fd = os.open(self.path, os.O_RDONLY | os.O_NOFOLLOW)
            except FileNotFoundError:
                return
            try:
                state, _ = self._sync(fd)
            finally:
                os.close(fd)
            self._write_checkpoint(state)

    @staticmethod
    def _whole_torn(torn: bytes, state: LogState) -> dict | None:
        try:
            cand = json.loads(torn)
            if (isinstance(cand, dict) and shape_problem(cand) is None and cand.get("seq") == state.seq + 1
                    and cand.get("prev") == state.hash and cand.get("hash") == entry_hash(cand)):
                return cand
        except (ValueError, UnicodeDecodeError):  # not JSON, or not representable in its signed form
            return None
        return None

    def _continue_after_anchor(self, seq: int, prev: str) -> tuple[int, str]:
        """Where to continue when the file ends before its anchor.

        A ledger deleted, cut at a line boundary or replaced by an older copy
        would otherwise be extended from its short tail and the anchor
        overwritten, erasing the evidence.  Continuing after the anchored
        entry instead leaves a visible gap ("entries N to M missing").
        """
        try:
            doc = json.loads(self.anchor_path.read_text("utf-8"))
            a_seq, a_hash = doc["seq"], doc["hash"]
            if not (isinstance(a_seq, int) and isinstance(a_hash, str) and HEX64.match(a_hash)):
                return seq, prev
            self._key.public_key().verify(bytes.fromhex(doc["sig"]), anchor_body(a_seq, a_hash, doc.get("v")))
        except _BAD:
            return seq, prev  # no usable anchor of ours: verification reports it
        if a_seq > seq:
            return a_seq, a_hash
        return seq, prev

    def _write_signed(self, path: Path, doc: dict) -> None:
        # Temp file, fsync, rename.  The directory is not fsynced: after a
        # crash the file is either this one or the previous one, and one that
        # is behind the ledger is normal.
        tmp = path.with_name(f".{path.name}.tmp{os.getpid()}.{threading.get_ident()}")
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_NOFOLLOW, FILE_MODE)
        try:
            _write_all(fd, signed_form(doc, ENTRY_VERSION) + b"\n")
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)

    def _write_anchor(self, seq: int, hash_: str) -> None:
        sig = self._key.sign(anchor_body(seq, hash_)).hex()
        self._write_signed(self.anchor_path, {"v": ENTRY_VERSION, "seq": seq, "hash": hash_, "sig": sig})

    def _write_checkpoint(self, state: LogState) -> None:
        body = state.to_dict()
        try:
            signed = checkpoint_body(body)
        except CanonicalJSONError:
            return  # a value RFC 8785 cannot hold (from an old entry): no checkpoint, the log is re-read
        sig = self._key.sign(signed).hex()
        self._write_signed(self.checkpoint_path, {"v": CHECKPOINT_VERSION, "state": body, "sig": sig})

    # -- reading ---------------------------------------------------------------
    def entries(self) -> Iterator[dict]:
        """Every well-formed entry in file order.

        A torn last line is skipped; a line that is not an entry is skipped and
        counted in :attr:`damaged` (use :func:`verify_ledger` to check the chain
        and signatures).
        """
        try:
            f = open(self.path, "rb")  # noqa: SIM115 (closed by the with below)
        except FileNotFoundError:
            return
        bad = 0
        with f:
            for line in f:
                if not line.endswith(b"\n"):
                    break
                entry = parse_line(line[:-1])
                if entry is None:
                    bad += 1
                    continue
                yield entry
        self._damaged_seen = bad

    def head(self) -> dict:
        """``{"seq", "hash"}`` of the last well-formed entry; seq -1 and 64 zeros when empty."""
        s = self.state()
        return {"seq": s.seq, "hash": s.hash}

    def anchor(self) -> dict | None:
        """The anchor document as stored, or None when there is none."""
        try:
            return json.loads(self.anchor_path.read_text("utf-8"))
        except FileNotFoundError:
            return None
        except ValueError:
            raise IntegrityError(f"{self.anchor_path}: the anchor is not valid JSON") from None


def _write_all(fd, data: bytes) -> None:
    view = memoryview(data)
    while view:
        try:
            n = os.write(fd, view)
        except InterruptedError:
            continue
        except OSError as e:
            if e.errno == errno.EINTR:
                continue
            raise
        view = view[n:]
