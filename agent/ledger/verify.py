"""Ledger verification: chain, signatures (across cores), anchor, checkpoint, Merkle log, retention.

Also the log section every bundle carries (size, root, origin and consistency
proofs from earlier exports) and :func:`verify_log_continuity`, which the
study side runs on two successive bundles of one device.  See ``docs/ledger.md``.
"""

from __future__ import annotations

import json
import os
import time
from collections.abc import Iterator
from dataclasses import asdict, dataclass, field
from typing import Any
from pathlib import Path

from cryptography.exceptions import InvalidSignature

from .. import merkle
from ..errors import LetheError
from ..stats import exposure_summary
from .events import ZERO_HASH, anchor_body, content_problems, entry_hash, shape_problem
from .log import CHECKPOINT_NAME, CHECKPOINT_VERSIONS, LogState, checkpoint_body, resolve_paths

PROBLEMS_PER_CHECK = 20  # further problems of one check are summarised in one line

# What a damaged or foreign key, anchor or checkpoint file can raise.
_BAD = (InvalidSignature, LetheError, ValueError, KeyError, TypeError, AttributeError, OSError)


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
    exposure: dict = field(default_factory=dict)      # {"n", "median_s", "p95_s", "max_s"} (stats.exposure_summary)
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
    alarms: list = field(default_factory=list)        # {"seq", "t", "check", "lines"}
    damaged_lines: int = 0                            # lines that are not entries
    size: int = 0                                     # Merkle leaves (well-formed entries)
    root: str = merkle.EMPTY_ROOT.hex()               # RFC 9162 tree head, hex
    origin: str | None = None                         # entry hash of the first entry
    checkpoint: dict | None = None                    # {"seq", "size", "root"} of a verified checkpoint
    withdrawn: dict | None = None                     # {"seq", "t", "scope"} of a withdrawn entry
    verified_at: float | None = None

    leaves: list | None = field(default=None, repr=False)  # Merkle leaf hashes when asked for

    def to_dict(self) -> dict:
        d = asdict(self)
        d.pop("leaves", None)
        return d

    def messages(self, check: str | None = None) -> list[str]:
        return [p["message"] for p in self.problems if check is None or p["check"] == check]

    def summary(self) -> str:
        """A few plain lines for a terminal (no item ids)."""
        e = self.exposure
        lines = [f"ledger {self.path}: {self.entries} entries, head {self.head['seq']} "
                 f"({self.head['hash'][:12]}), {'OK' if self.ok else 'FAILED'}"]
        if e.get("n"):
            lines.append(f"raw exposure over {e['n']} items: median {e['median_s']:.2f} s, "
                         f"p95 {e['p95_s']:.2f} s, max {e['max_s']:.2f} s"
                         + (f" (limit {self.limit_s:g} s)" if self.limit_s is not None else ""))
        lines += [f"problem [{p['check']}]: {p['message']}" for p in self.problems]
        if self.violations:
            lines.append(f"{len(self.violations)} retention violation(s)")
        if self.pending:
            lines.append(f"{len(self.pending)} item(s) pending destruction within the window")
        return "\n".join(lines)


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


def _limit_from(retention_limit_s, root: Path, notes: list) -> float | None:
    if retention_limit_s is None:
        path = root / "policy.toml"
        if not path.exists():
            notes.append("no retention limit given and no policy in the home: retention limits not checked")
            return None
        from ..policy import load_policy

        return float(load_policy(path).retention.raw_seconds)
    if isinstance(retention_limit_s, bool) or not isinstance(retention_limit_s, (int, float)) \
            or not retention_limit_s >= 0 or retention_limit_s == float("inf"):
        raise ValueError(f"verify_ledger: retention_limit_s must be a finite number of seconds >= 0, "
                         f"got {retention_limit_s!r} (pass policy.retention.raw_seconds for a policy)")
    return float(retention_limit_s)


SIG_CHUNK = 4096          # entries per signature-verification task
PARALLEL_FROM = 8192      # ledgers shorter than this are verified in this process


def _verify_sigs(pub_raw: bytes, items: list[tuple[int, str, str]]) -> list[int]:
    """Ed25519 verification of ``(seq, sig hex, hash hex)`` items; returns the failing seqs."""
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

    pub = Ed25519PublicKey.from_public_bytes(pub_raw)
    bad = []
    for seq, sig, h in items:
        try:
            pub.verify(bytes.fromhex(sig), bytes.fromhex(h))
        except _BAD:
            bad.append(seq)
    return bad


class _Signatures:
    """Signature checks in chunks: inline for short ledgers, worker processes for long ones."""

    def __init__(self, pub, workers: int | None):
        from cryptography.hazmat.primitives import serialization

        self.pub = pub
        self.raw = pub.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw) if pub else b""
        self.workers = max(1, int(workers if workers is not None else (os.cpu_count() or 1)))
        self.pending: list[tuple[int, str, str]] = []
        self.futures: list = []
        self.failed: list[int] = []
        self.pool: Any = None  # a ProcessPoolExecutor once the ledger is long enough
        self.seen = 0

    def add(self, seq: int, sig: str, h: str) -> None:
        if self.pub is None:
            return
        self.pending.append((seq, sig, h))
        self.seen += 1
        if len(self.pending) >= SIG_CHUNK and self.seen >= PARALLEL_FROM and self.workers > 1:
            if self.pool is None:
                import multiprocessing
                from concurrent.futures import ProcessPoolExecutor

                # forkserver: safe when the caller has threads (the agent does).
                self.pool = ProcessPoolExecutor(self.workers, mp_context=multiprocessing.get_context("forkserver"))
            self.futures.append(self.pool.submit(_verify_sigs, self.raw, self.pending))
            self.pending = []

    def finish(self) -> list[int]:
        try:
            if self.pending and self.pub is not None:
                if self.pool is not None:
                    self.futures.append(self.pool.submit(_verify_sigs, self.raw, self.pending))
                else:
                    self.failed += _verify_sigs(self.raw, self.pending)
            for f in self.futures:
                self.failed += f.result()
        finally:
            if self.pool is not None:
                self.pool.shutdown()
        return sorted(self.failed)


def verify_ledger(home_or_path=None, public_key=None, retention_limit_s: float | None = None,
                  now: float | None = None, *, workers: int | None = None, keep_leaves: bool = False) -> LedgerReport:
    """Check a ledger's chain, signatures, anchor, checkpoint and retention record.

    Parameters
    ----------
    home_or_path : Home, path-like
        A lethe home (or a copy of one), or the ledger file itself (its anchor
        is then the sibling ``.head`` file).
    public_key : Ed25519PublicKey, bytes or str, optional
        The device public key; default ``HOME/keys/device.pub``.  No passphrase
        is ever needed.
    retention_limit_s : float, optional
        The raw-retention limit in seconds (a policy's ``retention.raw_seconds``);
        default the limit of the home's ``policy.toml``, and none (retention
        not judged) when the home has no policy.
    now : float, optional
        Unix seconds at which pending items are judged; default now.
    workers : int, optional
        Processes for signature verification of long ledgers (default: one
        per core; 1 verifies in this process).
    keep_leaves : bool
        Keep the Merkle leaf hashes in ``report.leaves`` (for proofs).

    Returns
    -------
    LedgerReport
        Never raises for a damaged ledger: every finding is in ``problems``.

    Notes
    -----
    Each line is checked in this order, and nothing in it is trusted before
    it is authenticated: its version (first), the envelope's framing, the
    entry hash over the version's signed form, the chain, the signature (in
    batches, across processes for long ledgers; any failure fails the
    report), and only then its content against the ledger-entry contract
    (``agent/contracts/schemas/ledger-entry.json``) before it is counted.
    An entry whose hash does not match is not counted.
    """
    from ..keystore import device_key_id, public_key_from, read_device_public

    path, anchor_path, root = resolve_paths(home_or_path)
    now = time.time() if now is None else float(now)
    report = LedgerReport(path=str(path), verified_at=now)
    probs = _Problems()
    notes = report.notes
    report.limit_s = limit = _limit_from(retention_limit_s, root, notes)

    pub = None
    try:
        pub = public_key_from(public_key) if public_key is not None else read_device_public(root / "keys")
        report.device_key_id = device_key_id(pub)
    except _BAD as e:  # a missing or damaged key file is a finding, not a crash
        probs.add(None, "key", f"no usable device public key ({e}); signatures cannot be checked")
    kid = report.device_key_id

    try:
        f = open(path, "rb")  # noqa: SIM115 (closed by the with below)
    except FileNotFoundError:
        probs.add(None, "missing", f"{path}: no ledger here")
        report.problems = probs.finish()
        report.ok = False
        report.exposure = exposure_summary([])
        return report

    counts, kinds, rejections = report.counts, report.kinds, report.rejections
    open_items: dict[str, dict] = {}
    seen: set[int] = set()
    gaps: list[tuple[int, int]] = []
    expected = 0
    max_seq = -1
    prev_line = None          # (seq, hash) of the previous well-formed line
    anchor_doc: Any = None
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
    cp = _read_checkpoint_doc(path.with_name(CHECKPOINT_NAME), pub, probs)
    cp_seen = False
    sigs = _Signatures(pub, workers)
    state = LogState()
    leaves: list[bytes] | None = [] if keep_leaves else None
    n_entries = 0
    last_t = None
    top_version = 0            # versions never go down along the log

    with f:
        for lineno, line in enumerate(f, 1):
            if not line.endswith(b"\n"):
                report.truncated_bytes = len(line)
                after = f"after entry {prev_line[0]}" if prev_line else "at the start"
                probs.add(None, "truncation",
                          f"the last line is incomplete ({len(line)} bytes {after}): a write was torn by a "
                          f"crash or the file was truncated (the agent repairs and records this on its next append)")
                break
            state.offset += len(line)
            try:
                entry = json.loads(line)
            except (ValueError, UnicodeDecodeError):
                probs.add(None, "json", f"line {lineno}: not valid JSON")
                state.note_damaged()
                prev_line = None
                continue
            shape = shape_problem(entry)
            if shape:
                probs.add(entry.get("seq") if isinstance(entry, dict) else None, "schema", f"line {lineno}: {shape}")
                state.note_damaged()
                prev_line = None
                continue
            n_entries += 1
            raw = line[:-1]
            state.apply(entry, raw)
            if leaves is not None:
                leaves.append(merkle.leaf_hash(raw))
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
            try:
                hash_ok = entry_hash(entry) == stored
                if not hash_ok:
                    probs.add(seq, "hash", f"entry {seq}: content does not match its hash")
            except ValueError as e:  # a version-2 entry holding a value RFC 8785 cannot represent
                hash_ok = False
                probs.add(seq, "hash", f"entry {seq}: its content has no signed form ({e})")
            if entry["v"] < top_version:
                probs.add(seq, "schema", f"entry {seq}: version {entry['v']} after a version-{top_version} "
                                         f"entry (versions never go down)")
            top_version = max(top_version, entry["v"])
            sigs.add(seq, entry["sig"], stored)
            if seq == 0 and entry["prev"] != ZERO_HASH:
                probs.add(seq, "chain", "entry 0: does not start a chain (prev is not 64 zeros)")
            elif prev_line is not None and prev_line[0] == seq - 1 and entry["prev"] != prev_line[1]:
                probs.add(seq, "chain", f"entry {seq}: its previous-hash link does not match entry {seq - 1}")
            if seq == anchor_seq:
                hash_at_anchor = stored
            if cp is not None and state.offset == cp.get("offset"):
                cp_seen = True
                _compare_checkpoint(cp, state, probs)
            prev_line = (seq, stored)
            report.head = {"seq": seq, "hash": stored}
            # content: checked against the contract once the entry is authenticated, then accounted
            event = entry["event"]
            trusted = hash_ok
            if hash_ok:
                for b in content_problems(entry):
                    probs.add(seq, "schema", f"entry {seq}: {b}")
                    trusted = False
            counts[event] = counts.get(event, 0) + 1
            t = entry["t"]
            if report.first_t is None:
                report.first_t = t
            if last_t is not None and t < last_t - 1.0:
                notes.append(f"entry {seq}: time goes back {last_t - t:.1f} s (clock change?)")
            last_t = t
            if trusted:
                _account(report, event, entry, seq, t, open_items, limit, kinds, rejections)
    report.entries = n_entries
    report.last_t = last_t
    report.size, report.root, report.origin = state.size, state.root(), state.origin
    report.damaged_lines = state.damaged
    report.leaves = leaves
    if cp is not None and not cp_seen:
        probs.add(cp.get("seq"), "checkpoint",
                  f"{CHECKPOINT_NAME}: the signed checkpoint records entry {cp.get('seq')} at byte "
                  f"{cp.get('offset')}, which this ledger does not have there: entries were removed or the "
                  f"ledger was replaced")

    for lo, hi in gaps:
        missing = [s for s in range(lo, hi + 1) if s not in seen]
        for run_lo, run_hi in _runs(missing):
            if run_lo == run_hi:
                probs.add(run_lo, "seq", f"entry {run_lo} missing")
            else:
                probs.add(run_lo, "seq", f"entries {run_lo} to {run_hi} missing")

    sig_fail = sigs.finish()
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
    report.exposure = exposure_summary(report.exposures)
    report.problems = probs.finish()
    report.ok = not report.problems and not report.violations
    return report


def _read_checkpoint_doc(path: Path, pub, probs) -> dict | None:
    """The checkpoint's state if one exists and its signature verifies (else a problem, or None)."""
    try:
        doc = json.loads(path.read_text("utf-8"))
    except FileNotFoundError:
        return None
    except (OSError, ValueError, UnicodeDecodeError):
        probs.add(None, "checkpoint", f"{path.name}: the checkpoint is damaged (not JSON)")
        return None
    try:
        state = doc["state"]
        v = doc.get("v")
        if isinstance(v, bool) or v not in CHECKPOINT_VERSIONS:
            probs.add(None, "checkpoint", f"{path.name}: checkpoint version {v!r} is not supported (this lethe "
                                          f"reads {' and '.join(map(str, CHECKPOINT_VERSIONS))})")
            return None
        if pub is not None:
            pub.verify(bytes.fromhex(doc["sig"]), checkpoint_body(state, v))
        if not isinstance(state.get("offset"), int):
            raise ValueError
    except _BAD:
        probs.add(None, "checkpoint", f"{path.name}: the checkpoint's signature does not verify with the "
                                      f"device key, or it is not a checkpoint")
        return None
    return state


def _compare_checkpoint(cp: dict, state: LogState, probs) -> None:
    mine = state.to_dict()
    differ = [k for k in ("seq", "hash", "size", "root", "origin", "counts", "kinds", "reasons", "open",
                          "exposure_ms", "taken", "damaged")
              if json.loads(json.dumps(mine[k])) != cp.get(k)]
    if differ:
        probs.add(cp.get("seq"), "checkpoint",
                  f"entry {cp.get('seq')}: the signed checkpoint does not match the ledger up to it "
                  f"({', '.join(differ)} differ): entries before it were changed")


def _runs(values: list[int]) -> Iterator[tuple[int, int]]:
    if not values:
        return
    start = prev = values[0]
    for v in values[1:]:
        if v == prev + 1:
            prev = v
        else:
            yield start, prev
            start = prev = v
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
        exp = {"seq": seq, "t": t, "bundle_seq": f["bundle_seq"], "digest": f["digest"]}
        if "log_size" in f:
            exp["log_size"] = f["log_size"]
        report.exports.append(exp)
    elif event == "repaired":
        report.repairs.append({"seq": seq, "t": t, "dropped_bytes": f["dropped_bytes"]})
        report.notes.append(f"entry {seq}: the agent repaired a torn last line ({f['dropped_bytes']} bytes dropped)")
    elif event == "policy":
        report.policies.append({"seq": seq, "t": t, "fingerprint": f["fingerprint"]})
    elif event == "alarm":
        report.alarms.append({"seq": seq, "t": t, "check": f["check"], "lines": f["lines"]})
        report.notes.append(f"entry {seq}: the agent found {f['lines']} damaged ledger line(s) and recorded "
                            f"an integrity alarm")
    elif event == "withdrawn":
        report.withdrawn = {"seq": seq, "t": t, "scope": f.get("scope")}


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
                       anchor_body(anchor_doc["seq"], anchor_doc["hash"], anchor_doc.get("v")))
        except _BAD:
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
    """The compact ledger summary that travels in each bundle.

    Its exposure members are :func:`agent.stats.exposure_summary`'s
    ``max_s``, ``median_s`` and ``p95_s`` under the payload's names
    ``max_exposure_s``, ``median_exposure_s`` and ``p95_exposure_s``
    (payload schema 2, unchanged).
    """
    e = report.exposure or exposure_summary(report.exposures)
    return {"counts": dict(sorted(report.counts.items())),
            "max_exposure_s": e.get("max_s"),
            "median_exposure_s": e.get("median_s"),
            "p95_exposure_s": e.get("p95_s"),
            "violations": len(report.violations),
            "head": {"seq": report.head["seq"], "hash": report.head["hash"]}}




# -- the log section of a bundle, and continuity between bundles ----------------------

LOG_PROOFS_KEPT = 8  # consistency proofs from this many earlier export sizes travel in a bundle


def log_section(report: LedgerReport) -> dict:
    """The ``log`` section of a bundle payload from a report made with ``keep_leaves=True``.

    ``{"size", "root", "origin", "head": {"seq", "hash"}, "counts": {event: n},
    "proofs": [{"from_size", "from_root", "proof": [hex, ...]}, ...]}``: the
    Merkle tree head of the ledger now, and consistency proofs (RFC 9162
    section 2.1.4) from the log sizes recorded by the last
    :data:`LOG_PROOFS_KEPT` exports, so the study can check that this log
    extends the one it saw in an earlier bundle even when a bundle in between
    was lost.
    """
    leaves = report.leaves
    if leaves is None:
        raise ValueError("log_section: verify the ledger with keep_leaves=True")
    sizes: list[int] = []
    for e in reversed(report.exports):
        m = e.get("log_size")
        if isinstance(m, int) and 0 < m <= len(leaves) and m not in sizes:
            sizes.append(m)
        if len(sizes) >= LOG_PROOFS_KEPT:
            break
    proofs = [{"from_size": m, "from_root": merkle.root(leaves[:m]).hex(),
               "proof": [x.hex() for x in merkle.consistency_proof(m, leaves)]} for m in sorted(sizes)]
    return {"size": len(leaves), "root": merkle.root(leaves).hex(), "origin": report.origin,
            "head": {"seq": report.head["seq"], "hash": report.head["hash"]},
            "counts": dict(sorted(report.counts.items())), "proofs": proofs}


def _hex32(v) -> bytes | None:
    if isinstance(v, str) and len(v) == 64:
        try:
            return bytes.fromhex(v)
        except ValueError:
            return None
    return None


def verify_log_continuity(previous: dict | None, current: dict | None, origin: str | None = None) -> list[str]:
    """Problems between the log sections of two successive bundles of one device.

    Parameters
    ----------
    previous : dict or None
        The ``log`` section of the last bundle opened from this device (None
        for its first bundle).
    current : dict
        The ``log`` section of the bundle being opened.
    origin : str, optional
        The log origin recorded in the device's enrolment (the first entry's
        hash); the current log must start there.

    Returns
    -------
    list of str
        Empty when the current log extends the previous one.  Otherwise each
        problem names what happened: a *reset* (a new log was started), a
        *rollback* (the log is shorter than before), a *rewrite* (the proof
        does not hold), or *counts going down*.
    """
    if not isinstance(current, dict):
        return ["the bundle carries no log section: its ledger's continuity cannot be checked"]
    out: list[str] = []
    size, root = current.get("size"), _hex32(current.get("root"))
    if not isinstance(size, int) or isinstance(size, bool) or size < 0 or root is None:
        return ["the bundle's log section has no valid size and root"]
    cur_origin = current.get("origin")
    if origin is not None and cur_origin != origin:
        out.append(f"reset: the log starts at entry hash {str(cur_origin)[:16]}..., but the enrolment recorded "
                   f"{origin[:16]}...: the device started a new ledger")
    if previous is None:
        return out
    if not isinstance(previous, dict) or not isinstance(previous.get("size"), int) \
            or _hex32(previous.get("root")) is None:
        return out + ["the previous bundle carries no valid log section: continuity starts with this bundle"]
    p_size, p_root = previous["size"], _hex32(previous["root"])
    if previous.get("origin") != cur_origin and (origin is None or previous.get("origin") == origin):
        out.append(f"reset: the log now starts at entry hash {str(cur_origin)[:16]}..., the previous bundle's "
                   f"started at {str(previous.get('origin'))[:16]}...: the device started a new ledger")
    if size < p_size:
        out.append(f"rollback: the log has {size} entries, the previous bundle's had {p_size}")
    else:
        proof = next((p for p in current.get("proofs") or [] if isinstance(p, dict) and p.get("from_size") == p_size),
                     None)
        if size == p_size:
            if root != p_root:
                out.append(f"rewrite: the log has the same {size} entries as in the previous bundle but a "
                           f"different root")
        elif proof is None:
            sizes = [p.get("from_size") for p in current.get("proofs") or [] if isinstance(p, dict)]
            out.append(f"no consistency proof from the previous bundle's log size {p_size} (proofs from "
                       f"{sizes or 'none'}): the device did not record that export")
        else:
            maybe = [_hex32(x) for x in proof.get("proof") or []]
            nodes = [x for x in maybe if x is not None]
            if _hex32(proof.get("from_root")) != p_root:
                out.append(f"rewrite: the first {p_size} entries now have a different root than in the "
                           f"previous bundle")
            elif len(nodes) != len(maybe) or p_root is None \
                    or not merkle.verify_consistency(p_size, size, p_root, root, nodes):
                out.append(f"rewrite: the consistency proof from {p_size} to {size} entries does not hold: "
                           f"entries the previous bundle covered were changed or removed")
    p_counts, c_counts = previous.get("counts") or {}, current.get("counts") or {}
    for event in sorted(p_counts):
        before, now = p_counts.get(event), c_counts.get(event, 0)
        if isinstance(before, int) and isinstance(now, int) and now < before:
            out.append(f"counts go down: {event!r} was {before}, now {now}")
    return out
