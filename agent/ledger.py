"""The append-only, hash-chained, signed audit log of what happened to raw data.

Terminology
-----------
entry
    One JSON object on one line of ``HOME/ledger.jsonl``.
chain
    Each entry names the hash of the one before it (``prev``); the first names
    64 zeros.  Removing, inserting or reordering entries breaks the chain or
    the sequence numbers.
entry hash
    SHA-256 (hex) of the canonical JSON (sorted keys, no whitespace, UTF-8) of
    the entry without its ``hash`` and ``sig`` members.
signature
    Ed25519 (device key) over the 32 bytes of the entry hash, hex encoded.
anchor
    ``HOME/ledger.head``: the signed ``{seq, hash}`` of the last entry, rewritten
    atomically after every append.  A ledger that ends before its anchor was
    cut short or rolled back to an older copy.
exposure
    Seconds from a raw file becoming complete (``complete_at``) to its
    destruction; the policy bounds it by ``retention.raw_seconds``.

The full format, every check and what the ledger cannot prove are in
``docs/ledger.md``.  No entry carries content, a file name or an unkeyed hash:
items are named by their keyed content MAC and reasons are short codes.
"""

from __future__ import annotations

import errno
import hashlib
import json
import math
import os
import re
import threading
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable, Iterable, Iterator

from .errors import IntegrityError, StateError
from .fsutil import FILE_MODE, fsync_dir, lock_fd
from .home import Home
from .stats import quantile_type7

ENTRY_VERSION = 1
ZERO_HASH = "0" * 64
RESERVED = ("v", "seq", "prev", "t", "event", "hash", "sig")
KINDS = ("audio", "gps", "accel", "mood", "unknown")

_HEX64 = re.compile(r"[0-9a-f]{64}\Z")
_ITEM = re.compile(r"[0-9a-f]{16,64}\Z")
_CODE = re.compile(r"[a-z0-9_]{1,64}\Z")
_LABEL = re.compile(r"[A-Za-z0-9._:+-]{1,64}\Z")


# -- field types ---------------------------------------------------------------
# Each returns (value, None) or (None, "what was expected").

def _number(v):
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        try:
            import numpy as np  # numpy scalars from the feature code are fine
            if isinstance(v, (np.integer, np.floating)):
                v = v.item()
            else:
                return None, "a number"
        except ImportError:  # pragma: no cover
            return None, "a number"
    v = float(v)
    if not math.isfinite(v):
        return None, "a finite number"
    return v, None


def _time(v):
    v, err = _number(v)
    if err:
        return None, err
    if v < 0:
        return None, "Unix seconds (>= 0)"
    return v, None


def _opt_time(v):
    return (None, None) if v is None else _time(v)


def _seconds(v):
    v, err = _number(v)
    return (None, err) if err else (v, None)


def _count(v):
    if isinstance(v, bool):
        return None, "a non-negative integer"
    try:
        import operator
        v = operator.index(v)
    except TypeError:
        return None, "a non-negative integer"
    if v < 0:
        return None, "a non-negative integer"
    return int(v), None


def _pattern(rx, what):
    def check(v):
        if isinstance(v, str) and rx.match(v):
            return v, None
        return None, what
    return check


_item = _pattern(_ITEM, "an item id (16 to 64 lowercase hex digits of a keyed content MAC)")
_hex64 = _pattern(_HEX64, "64 lowercase hex digits")
_code = _pattern(_CODE, "a short code (lowercase letters, digits, underscore; at most 64)")
_label = _pattern(_LABEL, "a short label (letters, digits, . _ : + -; at most 64)")


def _kind(v):
    return (v, None) if v in KINDS else (None, "one of " + ", ".join(KINDS))


def _counts(v):
    if not isinstance(v, dict):
        return None, "a mapping of short codes to counts"
    out = {}
    for k, n in v.items():
        if not isinstance(k, str) or not _CODE.match(k):
            return None, "a mapping of short codes to counts"
        n, err = _count(n)
        if err:
            return None, "a mapping of short codes to counts"
        out[k] = n
    return out, None


_CONTENT = {"item": _item, "kind": _kind}

# event -> (required fields, optional fields)
EVENT_FIELDS: dict[str, tuple[dict, dict]] = {
    "agent_start": ({}, {"version": _label, "mode": _code}),
    "agent_stop": ({}, {"reason": _code}),
    "policy": ({"fingerprint": _hex64}, {"name": _label, "version": _label}),
    "received": ({**_CONTENT, "bytes": _count, "complete_at": _time}, {}),
    "featurised": ({**_CONTENT, "rows": _count}, {}),
    "rejected": ({**_CONTENT, "reason": _code}, {"bytes": _count, "complete_at": _time}),
    "destroyed": ({**_CONTENT, "complete_at": _time, "exposure_s": _seconds}, {"bytes": _count}),
    "paused": ({"until": _opt_time}, {"reason": _code}),
    "resumed": ({}, {}),
    "coded": ({"counts": _counts}, {}),
    "exported": ({"bundle_seq": _count, "digest": _hex64}, {}),
    "withdrawn": ({}, {"scope": _code}),
    "repaired": ({"dropped_bytes": _count}, {}),
}
LEDGER_EVENTS = tuple(EVENT_FIELDS)


def check_fields(event, fields: dict) -> tuple[dict, list[str]]:
    """Validate an event's fields; returns (normalised fields, problems)."""
    if event not in EVENT_FIELDS:
        return {}, [f"unknown event {event!r} (known: {', '.join(LEDGER_EVENTS)})"]
    required, optional = EVENT_FIELDS[event]
    out, problems = {}, []
    for name in fields:
        if name in RESERVED:
            problems.append(f"field {name!r} is set by the ledger itself")
        elif name not in required and name not in optional:
            allowed = list(required) + list(optional)
            problems.append(f"event {event!r} has no field {name!r} "
                            f"(allowed: {', '.join(allowed) if allowed else 'none'})")
    for name, check in {**required, **optional}.items():
        if name not in fields:
            if name in required:
                problems.append(f"event {event!r} lacks field {name!r}")
            continue
        value, err = check(fields[name])
        if err:
            problems.append(f"event {event!r}: field {name!r} = {fields[name]!r} is not {err}")
        else:
            out[name] = value
    return out, problems


def entry_hash(entry: dict) -> str:
    """SHA-256 hex of the canonical JSON of ``entry`` without ``hash`` and ``sig``."""
    body = {k: v for k, v in entry.items() if k not in ("hash", "sig")}
    return hashlib.sha256(_canonical(body)).hexdigest()


def _canonical(obj) -> bytes:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False).encode("utf-8")


def _anchor_body(seq: int, hash_: str) -> bytes:
    return _canonical({"v": ENTRY_VERSION, "seq": seq, "hash": hash_})


# One lock per ledger file for the whole process: several Ledger objects on the
# same file (intake threads, a pause command) must not interleave appends.
_LOCKS: dict[str, threading.Lock] = {}
_LOCKS_GUARD = threading.Lock()


def _path_lock(path: Path) -> threading.Lock:
    key = os.path.realpath(path)
    with _LOCKS_GUARD:
        return _LOCKS.setdefault(key, threading.Lock())


def _resolve(home_or_path) -> tuple[Path, Path, Path]:
    """(ledger file, anchor file, home root) for a home, a home path or a ledger path."""
    if isinstance(home_or_path, Home):
        return home_or_path.ledger_path, home_or_path.ledger_head_path, home_or_path.root
    p = Path(home_or_path if home_or_path is not None else Home().root)
    if p.is_dir():
        h = Home(p)
        return h.ledger_path, h.ledger_head_path, h.root
    return p, p.with_suffix(".head"), p.parent


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
    """

    def __init__(self, home=None, signing_key=None, *, clock: Callable[[], float] | None = None):
        self.path, self.anchor_path, self.root = _resolve(home if home is not None else Home())
        self._key = signing_key
        self._clock = clock or time.time
        self._lock = _path_lock(self.path)
        self._tail = None  # (inode, size, seq, hash) after our last append or read

    def __repr__(self):
        return f"Ledger({str(self.path)!r}{'' if self._key else ', read-only'})"

    # -- appending -------------------------------------------------------------
    def append(self, event: str, **fields) -> dict:
        """Append one signed entry durably and return it.

        Raises
        ------
        ValueError
            For an unknown event, an unknown field or a field of the wrong type
            (a programming error, never data dependent).
        """
        return self.append_many([(event, fields)])[-1]

    def append_many(self, events: Iterable[tuple[str, dict]]) -> list[dict]:
        """Append several entries with one write and one fsync; returns them in order."""
        checked = []
        for event, fields in events:
            norm, problems = check_fields(event, dict(fields))
            if problems:
                raise ValueError(f"ledger: {'; '.join(problems)}")
            checked.append((event, norm))
        if not checked:
            return []
        if self._key is None:
            raise StateError(f"{self.path}: this ledger was opened read-only (no signing key)")
        with self._lock:
            created = not self.path.exists()
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_APPEND | os.O_NOFOLLOW, FILE_MODE)
            try:
                lock_fd(fd)  # other processes (pause, withdraw) append too
                st = os.fstat(fd)
                from_cache = self._tail is not None and self._tail[:2] == (st.st_ino, st.st_size)
                seq, prev, torn, whole = self._tail_state(fd)
                out = []
                if torn:
                    if whole is not None:
                        # The torn tail is a complete entry missing only its
                        # newline: keep it rather than lose, say, a destruction.
                        _write_all(fd, b"\n")
                        seq, prev = whole["seq"], whole["hash"]
                    else:
                        size = os.fstat(fd).st_size
                        os.ftruncate(fd, size - torn)
                        os.fsync(fd)
                        checked.insert(0, ("repaired", {"dropped_bytes": torn}))
                if not from_cache:
                    seq, prev = self._continue_after_anchor(seq, prev)
                lines = []
                for event, norm in checked:
                    seq += 1
                    entry = {"v": ENTRY_VERSION, "seq": seq, "prev": prev, "t": float(self._clock()),
                             "event": event, **norm}
                    entry["hash"] = entry_hash(entry)
                    entry["sig"] = self._key.sign(bytes.fromhex(entry["hash"])).hex()
                    prev = entry["hash"]
                    lines.append(json.dumps(entry, separators=(",", ":"), ensure_ascii=False,
                                            allow_nan=False).encode("utf-8") + b"\n")
                    out.append(entry)
                _write_all(fd, b"".join(lines))
                os.fsync(fd)
                st = os.fstat(fd)
                self._tail = (st.st_ino, st.st_size, seq, prev)
                self._write_anchor(seq, prev)
            finally:
                os.close(fd)
            if created:
                fsync_dir(self.path.parent)
        return out

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
            if not (isinstance(a_seq, int) and isinstance(a_hash, str) and _HEX64.match(a_hash)):
                return seq, prev
            self._key.public_key().verify(bytes.fromhex(doc["sig"]), _anchor_body(a_seq, a_hash))
        except Exception:
            return seq, prev  # no usable anchor of ours: verification reports it
        if a_seq > seq:
            return a_seq, a_hash
        return seq, prev

    def _write_anchor(self, seq: int, hash_: str) -> None:
        sig = self._key.sign(_anchor_body(seq, hash_)).hex()
        doc = {"v": ENTRY_VERSION, "seq": seq, "hash": hash_, "sig": sig}
        # Temp file, fsync, rename.  The directory is not fsynced: after a
        # crash the anchor is either this one or the previous one, and an
        # anchor behind the ledger is normal (verification only needs the
        # anchored entry to exist and match), so one fsync is saved per append.
        tmp = self.anchor_path.with_name(f".{self.anchor_path.name}.tmp{os.getpid()}.{threading.get_ident()}")
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_NOFOLLOW, FILE_MODE)
        try:
            _write_all(fd, _canonical(doc) + b"\n")
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, self.anchor_path)

    def _tail_state(self, fd) -> tuple[int, str, int, dict | None]:
        """(last seq, last hash, torn tail bytes, the torn tail as an entry if it is whole)."""
        st = os.fstat(fd)
        if self._tail and self._tail[:2] == (st.st_ino, st.st_size):
            return self._tail[2], self._tail[3], 0, None
        size = st.st_size
        if size == 0:
            return -1, ZERO_HASH, 0, None
        block = 1 << 16
        while True:
            start = max(0, size - block)
            data = os.pread(fd, size - start, start)
            cut = data.rfind(b"\n")  # end of the last complete line
            if cut < 0:
                if start > 0:
                    block *= 4
                    continue
                torn, last_line = len(data), b""
                break
            begin = data.rfind(b"\n", 0, cut)
            if begin < 0 and start > 0:
                block *= 4
                continue
            torn, last_line = len(data) - cut - 1, data[begin + 1:cut]
            break
        last = None
        if last_line:
            try:
                last = json.loads(last_line)
                seq, hash_ = last["seq"], last["hash"]
                if not isinstance(seq, int) or not isinstance(hash_, str) or not _HEX64.match(hash_):
                    raise ValueError
            except (ValueError, KeyError, TypeError):
                raise IntegrityError(f"{self.path}: the last complete entry is not a valid ledger entry; "
                                     f"refusing to extend it (run 'lethe audit verify')") from None
        else:
            seq, hash_ = -1, ZERO_HASH
        whole = None
        if torn:
            try:
                cand = json.loads(data[cut + 1:] if cut >= 0 else data)
                if (isinstance(cand, dict) and cand.get("seq") == seq + 1 and cand.get("prev") == hash_
                        and cand.get("hash") == entry_hash(cand)):
                    whole = cand
            except (ValueError, TypeError):
                whole = None
        return seq, hash_, torn, whole

    # -- reading ---------------------------------------------------------------
    def entries(self) -> Iterator[dict]:
        """Every complete entry in file order (a torn last line is skipped).

        Raises :class:`~agent.errors.IntegrityError` on a line that is not JSON;
        use :func:`verify_ledger` to check the chain and signatures.
        """
        try:
            f = open(self.path, "rb")
        except FileNotFoundError:
            return
        with f:
            for lineno, line in enumerate(f, 1):
                if not line.endswith(b"\n"):
                    return
                try:
                    yield json.loads(line)
                except ValueError:
                    raise IntegrityError(f"{self.path}: line {lineno} is not valid JSON") from None

    def head(self) -> dict:
        """``{"seq", "hash"}`` of the last complete entry; seq -1 and 64 zeros when empty."""
        try:
            fd = os.open(self.path, os.O_RDONLY | os.O_NOFOLLOW)
        except FileNotFoundError:
            return {"seq": -1, "hash": ZERO_HASH}
        try:
            seq, hash_, _torn, _whole = self._tail_state(fd)
        finally:
            os.close(fd)
        return {"seq": seq, "hash": hash_}

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


# -- verification --------------------------------------------------------------------

PROBLEMS_PER_CHECK = 20  # further problems of one check are summarised in one line


@dataclass
class LedgerReport:
    """What :func:`verify_ledger` found.  ``ok`` is False on any problem or violation."""

    path: str
    ok: bool = True
    entries: int = 0
    problems: list = field(default_factory=list)      # {"seq", "check", "message"}
    notes: list = field(default_factory=list)         # informative, not failures
    counts: dict = field(default_factory=dict)        # event -> entries
    kinds: dict = field(default_factory=dict)         # kind -> {"received", "featurised", "rejected", "destroyed"}
    rejections: dict = field(default_factory=dict)    # reason -> count
    exposures: list = field(default_factory=list)     # seconds, in ledger order
    exposure: dict = field(default_factory=dict)      # {"n", "median", "p95", "max"}
    limit_s: float | None = None
    violations: list = field(default_factory=list)    # {"seq", "item", "kind", "check", ...}
    pending: list = field(default_factory=list)       # {"item", "kind", "complete_at", "age_s"}
    head: dict = field(default_factory=lambda: {"seq": -1, "hash": ZERO_HASH})
    anchor: dict | None = None
    device_key_id: str | None = None
    truncated_bytes: int = 0
    first_t: float | None = None
    last_t: float | None = None
    daily: dict = field(default_factory=dict)         # UTC date -> {kind: items received}
    exports: list = field(default_factory=list)       # {"seq", "t", "bundle_seq", "digest"}
    repairs: list = field(default_factory=list)       # {"seq", "t", "dropped_bytes"}
    policies: list = field(default_factory=list)      # {"seq", "t", "fingerprint"}
    verified_at: float | None = None

    def to_dict(self) -> dict:
        return asdict(self)

    @property
    def exposure_stats(self) -> dict:
        """Alias of ``exposure``: ``{"n", "median", "p95", "max"}`` in seconds."""
        return self.exposure

    def messages(self, check: str | None = None) -> list[str]:
        return [p["message"] for p in self.problems if check is None or p["check"] == check]

    def summary(self) -> str:
        """A few plain lines for a terminal (no item ids)."""
        e = self.exposure
        lines = [f"ledger {self.path}: {self.entries} entries, head {self.head['seq']} "
                 f"({self.head['hash'][:12]}), {'OK' if self.ok else 'FAILED'}"]
        if e.get("n"):
            lines.append(f"raw exposure over {e['n']} items: median {e['median']:.2f} s, "
                         f"p95 {e['p95']:.2f} s, max {e['max']:.2f} s"
                         + (f" (limit {self.limit_s:g} s)" if self.limit_s is not None else ""))
        lines += [f"problem [{p['check']}]: {p['message']}" for p in self.problems]
        if self.violations:
            lines.append(f"{len(self.violations)} retention violation(s)")
        if self.pending:
            lines.append(f"{len(self.pending)} item(s) pending destruction within the window")
        return "\n".join(lines)


def exposure_stats(exposures) -> dict:
    """``{"n", "median", "p95", "max"}`` in seconds (None when there are none)."""
    xs = sorted(float(x) for x in exposures)
    if not xs:
        return {"n": 0, "median": None, "p95": None, "max": None}
    return {"n": len(xs), "median": quantile_type7(xs, 0.5), "p95": quantile_type7(xs, 0.95), "max": xs[-1]}


class _Problems:
    def __init__(self):
        self.items: list[dict] = []
        self.per_check: dict[str, int] = {}

    def add(self, seq, check: str, message: str) -> None:
        n = self.per_check.get(check, 0) + 1
        self.per_check[check] = n
        if n <= PROBLEMS_PER_CHECK:
            self.items.append({"seq": seq, "check": check, "message": message})

    def finish(self) -> list[dict]:
        for check, n in self.per_check.items():
            if n > PROBLEMS_PER_CHECK:
                self.items.append({"seq": None, "check": check,
                                   "message": f"... and {n - PROBLEMS_PER_CHECK} more {check} problem(s)"})
        return self.items


def _limit_from(policy, root: Path, notes: list) -> float | None:
    if policy is None:
        path = root / "policy.toml"
        if not path.exists():
            notes.append("no policy given and none in the home: retention limits not checked")
            return None
        from .policy import load_policy

        policy = load_policy(path)
    if isinstance(policy, (int, float)) and not isinstance(policy, bool):
        return float(policy)
    return float(policy.retention.raw_seconds)


def verify_ledger(home_or_path=None, public_key=None, policy=None, now: float | None = None) -> LedgerReport:
    """Check a ledger's chain, signatures, anchor and retention record.

    Parameters
    ----------
    home_or_path : Home, path-like
        A lethe home (or a copy of one), or the ledger file itself (its anchor
        is then the sibling ``.head`` file).
    public_key : Ed25519PublicKey, bytes or str, optional
        The device public key; default ``HOME/keys/device.pub``.  No passphrase
        is ever needed.
    policy : Policy or float, optional
        The policy (or directly the raw-retention limit in seconds); default
        the home's ``policy.toml``.
    now : float, optional
        Unix seconds at which pending items are judged; default now.

    Returns
    -------
    LedgerReport
        Never raises for a damaged ledger: every finding is in ``problems``.
    """
    from .keystore import device_key_id, public_key_from, read_device_public

    path, anchor_path, root = _resolve(home_or_path)
    now = time.time() if now is None else float(now)
    report = LedgerReport(path=str(path), verified_at=now)
    probs = _Problems()
    notes = report.notes
    report.limit_s = limit = _limit_from(policy, root, notes)

    pub = None
    try:
        pub = public_key_from(public_key) if public_key is not None else read_device_public(root / "keys")
        report.device_key_id = device_key_id(pub)
    except Exception as e:  # a missing or damaged key file is a finding, not a crash
        probs.add(None, "key", f"no usable device public key ({e}); signatures cannot be checked")
    kid = report.device_key_id

    try:
        f = open(path, "rb")
    except FileNotFoundError:
        probs.add(None, "missing", f"{path}: no ledger here")
        report.problems = probs.finish()
        report.ok = False
        report.exposure = exposure_stats([])
        return report

    counts, kinds, rejections = report.counts, report.kinds, report.rejections
    open_items: dict[str, dict] = {}
    seen: set[int] = set()
    gaps: list[tuple[int, int]] = []
    expected = 0
    max_seq = -1
    prev_line = None          # (seq, hash) of the previous well-formed line
    anchor_doc = None
    try:
        anchor_doc = json.loads(anchor_path.read_text("utf-8"))
        if not (isinstance(anchor_doc, dict) and isinstance(anchor_doc.get("seq"), int)
                and isinstance(anchor_doc.get("hash"), str)):
            raise ValueError
    except FileNotFoundError:
        anchor_doc = None
    except (ValueError, UnicodeDecodeError):
        probs.add(None, "anchor", f"{anchor_path.name}: the anchor is damaged (not a signed {{seq, hash}} document)")
        anchor_doc = False
    anchor_seq = anchor_doc["seq"] if anchor_doc else None
    hash_at_anchor = None
    sig_fail: list[int] = []
    n_entries = 0
    last_t = None

    with f:
        for lineno, line in enumerate(f, 1):
            if not line.endswith(b"\n"):
                report.truncated_bytes = len(line)
                after = f"after entry {prev_line[0]}" if prev_line else "at the start"
                probs.add(None, "truncation",
                          f"the last line is incomplete ({len(line)} bytes {after}): a write was torn by a "
                          f"crash or the file was truncated (the agent repairs and records this on its next append)")
                break
            try:
                entry = json.loads(line)
            except ValueError:
                probs.add(None, "json", f"line {lineno}: not valid JSON")
                prev_line = None
                continue
            shape = _shape_problem(entry)
            if shape:
                probs.add(entry.get("seq") if isinstance(entry, dict) else None, "schema", f"line {lineno}: {shape}")
                prev_line = None
                continue
            n_entries += 1
            seq = entry["seq"]
            # sequence: gaps are resolved at the end (a later line may fill them)
            if seq in seen:
                probs.add(seq, "order", f"entry {seq} appears more than once (again at line {lineno})")
            elif seq < expected:
                probs.add(seq, "order", f"entry {seq} is out of order: found after entry {max_seq}")
            elif seq > expected:
                gaps.append((expected, seq - 1))
            seen.add(seq)
            expected = max(expected, seq + 1)
            max_seq = max(max_seq, seq)
            # hash, signature, chain
            stored = entry["hash"]
            if entry_hash(entry) != stored:
                probs.add(seq, "hash", f"entry {seq}: content does not match its hash")
            if pub is not None:
                try:
                    pub.verify(bytes.fromhex(entry["sig"]), bytes.fromhex(stored))
                except Exception:
                    sig_fail.append(seq)
            if seq == 0 and entry["prev"] != ZERO_HASH:
                probs.add(seq, "chain", "entry 0: does not start a chain (prev is not 64 zeros)")
            elif prev_line is not None and prev_line[0] == seq - 1 and entry["prev"] != prev_line[1]:
                probs.add(seq, "chain", f"entry {seq}: its previous-hash link does not match entry {seq - 1}")
            if seq == anchor_seq:
                hash_at_anchor = stored
            prev_line = (seq, stored)
            report.head = {"seq": seq, "hash": stored}
            # event schema and accounting
            event = entry["event"]
            fields = {k: v for k, v in entry.items() if k not in RESERVED}
            norm, bad = check_fields(event, fields)
            for b in bad:
                probs.add(seq, "schema", f"entry {seq}: {b}")
            counts[event] = counts.get(event, 0) + 1
            t = entry["t"]
            if report.first_t is None:
                report.first_t = t
            if last_t is not None and t < last_t - 1.0:
                notes.append(f"entry {seq}: time goes back {last_t - t:.1f} s (clock change?)")
            last_t = t
            if not bad:
                _account(report, event, norm, seq, t, open_items, limit, kinds, rejections)
    report.entries = n_entries
    report.last_t = last_t

    for lo, hi in gaps:
        missing = [s for s in range(lo, hi + 1) if s not in seen]
        for run_lo, run_hi in _runs(missing):
            if run_lo == run_hi:
                probs.add(run_lo, "seq", f"entry {run_lo} missing")
            else:
                probs.add(run_lo, "seq", f"entries {run_lo} to {run_hi} missing")

    if pub is not None and sig_fail:
        if len(sig_fail) == n_entries:
            probs.add(None, "signature",
                      f"no entry's signature verifies with device key {kid}: the wrong public key was given, "
                      f"or the whole ledger was re-signed by another key")
        else:
            for s in sig_fail:
                probs.add(s, "signature", f"entry {s}: signature does not verify with device key {kid}")

    _check_anchor(report, probs, anchor_doc, anchor_path, pub, kid, max_seq, hash_at_anchor, n_entries)

    for item, rec in open_items.items():
        age = now - rec["complete_at"]
        if limit is not None and age > limit:
            report.violations.append({"seq": rec["seq"], "item": item, "kind": rec["kind"], "check": "not_destroyed",
                                      "age_s": age, "limit_s": limit,
                                      "message": f"entry {rec['seq']}: {rec['kind']} item {item} received but not "
                                                 f"destroyed {age:.1f} s after it was complete (limit {limit:g} s)"})
        else:
            report.pending.append({"seq": rec["seq"], "item": item, "kind": rec["kind"],
                                   "complete_at": rec["complete_at"], "age_s": age})
    report.exposure = exposure_stats(report.exposures)
    report.problems = probs.finish()
    report.ok = not report.problems and not report.violations
    return report


def _shape_problem(entry) -> str | None:
    if not isinstance(entry, dict):
        return "not a JSON object"
    for name, kinds in (("v", int), ("seq", int), ("prev", str), ("t", (int, float)), ("event", str),
                        ("hash", str), ("sig", str)):
        if name not in entry:
            return f"not a ledger entry (no {name!r})"
        if isinstance(entry[name], bool) or not isinstance(entry[name], kinds):
            return f"not a ledger entry ({name!r} has the wrong type)"
    if entry["v"] != ENTRY_VERSION:
        return f"entry version {entry['v']} is not supported (expected {ENTRY_VERSION})"
    if entry["seq"] < 0:
        return "not a ledger entry (negative seq)"
    if not _HEX64.match(entry["hash"]) or not _HEX64.match(entry["prev"]):
        return "not a ledger entry (hash or prev is not 64 hex digits)"
    if not re.fullmatch(r"[0-9a-f]{128}", entry["sig"]):
        return "not a ledger entry (sig is not 128 hex digits)"
    return None


def _runs(values: list[int]) -> Iterator[tuple[int, int]]:
    start = prev = None
    for v in values:
        if start is None:
            start = prev = v
        elif v == prev + 1:
            prev = v
        else:
            yield start, prev
            start = prev = v
    if start is not None:
        yield start, prev


def _account(report, event, f, seq, t, open_items, limit, kinds, rejections) -> None:
    kind = f.get("kind")
    if kind is not None:
        per = kinds.setdefault(kind, {"received": 0, "featurised": 0, "rejected": 0, "destroyed": 0})
        if event in per:
            per[event] += 1
    if event == "received":
        open_items.setdefault(f["item"], {"kind": kind, "complete_at": f["complete_at"], "seq": seq})
        day = time.strftime("%Y-%m-%d", time.gmtime(t))
        report.daily.setdefault(day, {}).setdefault(kind, 0)
        report.daily[day][kind] += 1
    elif event == "destroyed":
        rec = open_items.pop(f["item"], None)
        if rec is None:
            report.notes.append(f"entry {seq}: {kind} item {f['item']} destroyed without a received entry")
            complete_at = f["complete_at"]
        else:
            complete_at = rec["complete_at"]
        exposure = t - complete_at
        report.exposures.append(exposure)
        recorded = f["exposure_s"]
        if limit is not None and (exposure > limit or recorded > limit):
            report.violations.append({"seq": seq, "item": f["item"], "kind": kind, "check": "late",
                                      "exposure_s": exposure, "recorded_exposure_s": recorded, "limit_s": limit,
                                      "message": f"entry {seq}: {kind} item {f['item']} destroyed "
                                                 f"{max(exposure, recorded):.1f} s after it was complete "
                                                 f"(limit {limit:g} s)"})
    elif event == "rejected":
        rejections[f["reason"]] = rejections.get(f["reason"], 0) + 1
    elif event == "exported":
        report.exports.append({"seq": seq, "t": t, "bundle_seq": f["bundle_seq"], "digest": f["digest"]})
    elif event == "repaired":
        report.repairs.append({"seq": seq, "t": t, "dropped_bytes": f["dropped_bytes"]})
        report.notes.append(f"entry {seq}: the agent repaired a torn last line ({f['dropped_bytes']} bytes dropped)")
    elif event == "policy":
        report.policies.append({"seq": seq, "t": t, "fingerprint": f["fingerprint"]})


def _check_anchor(report, probs, anchor_doc, anchor_path, pub, kid, max_seq, hash_at_anchor, n_entries) -> None:
    if anchor_doc is False:
        return  # damaged: already reported
    if anchor_doc is None:
        if n_entries:
            probs.add(None, "anchor", f"{anchor_path.name} is missing: a rollback to an older copy of the "
                                      f"ledger cannot be ruled out")
        return
    report.anchor = {"seq": anchor_doc["seq"], "hash": anchor_doc["hash"]}
    if pub is not None:
        try:
            pub.verify(bytes.fromhex(str(anchor_doc.get("sig", ""))),
                       _anchor_body(anchor_doc["seq"], anchor_doc["hash"]))
        except Exception:
            probs.add(None, "anchor", f"{anchor_path.name}: the anchor's signature does not verify with "
                                      f"device key {kid}")
    a = anchor_doc["seq"]
    if a > max_seq:
        lost = a - max_seq
        where = "the ledger is empty" if max_seq < 0 else f"the ledger ends at entry {max_seq}"
        probs.add(a, "anchor", f"{where} but its anchor records entry {a}: rolled back to an older copy, "
                               f"or the last {lost} entr{'y' if lost == 1 else 'ies'} removed")
    elif hash_at_anchor is not None and hash_at_anchor != anchor_doc["hash"]:
        probs.add(a, "anchor", f"entry {a} does not match the anchor: the ledger was replaced or rewritten")


def digest(report: LedgerReport) -> dict:
    """The compact ledger summary that travels in each bundle."""
    e = report.exposure or exposure_stats(report.exposures)
    return {"counts": dict(sorted(report.counts.items())),
            "max_exposure_s": e.get("max"),
            "median_exposure_s": e.get("median"),
            "p95_exposure_s": e.get("p95"),
            "violations": len(report.violations),
            "head": {"seq": report.head["seq"], "hash": report.head["hash"]}}


__all__ = ["Ledger", "LedgerReport", "LEDGER_EVENTS", "EVENT_FIELDS", "KINDS", "ZERO_HASH",
           "verify_ledger", "digest", "entry_hash", "check_fields", "exposure_stats"]
