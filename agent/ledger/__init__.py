"""The append-only, hash-chained, signed Merkle log of what happened to raw data.

Terminology
-----------
entry
    One JSON object on one line of ``HOME/ledger.jsonl``.
chain
    Each entry names the hash of the one before it (``prev``); the first names
    64 zeros.  Removing, inserting or reordering entries breaks the chain or
    the sequence numbers.
entry version
    ``v``, checked first: 2 (written now) hashes the RFC 8785 canonical JSON
    (:mod:`agent.canonical`); 1 (still verified) hashed sorted-key JSON.
entry hash
    SHA-256 (hex) of the entry without its ``hash`` and ``sig`` members, in
    its version's canonical form.
event contract
    ``agent/contracts/schemas/ledger-entry.json`` (JSON Schema 2020-12): the
    envelope and one part per event; the writer refuses an event that does
    not meet it and the verifier checks every authenticated entry against it.
signature
    Ed25519 (device key) over the 32 bytes of the entry hash, hex encoded.
Merkle log
    The entries, each as the exact bytes of its line (without the newline),
    are the leaves of an RFC 9162 Merkle tree (:mod:`agent.merkle`).  Its
    *size* and *root* travel in every bundle with consistency proofs from
    earlier bundles; its *origin* (the first entry's hash) is in the enrolment.
anchor
    ``HOME/ledger.head``: the signed ``{seq, hash}`` of the last entry, rewritten
    atomically after every append.  A ledger that ends before its anchor was
    cut short or rolled back to an older copy.
checkpoint
    ``HOME/ledger.checkpoint``: the signed running state (Merkle frontier,
    counts, items not yet destroyed) every 512 entries, so start-up and status
    read only the entries after it; the verifier recomputes and compares it.
exposure
    Seconds from a raw file becoming complete (``complete_at``) to its
    destruction; the policy bounds it by ``retention.raw_seconds``.

Modules: :mod:`.events` (the event contract, versions, hashes), :mod:`.log` (the writer and its
running state), :mod:`.verify` (verification, bundle log sections, continuity).
The full format, every check and what the ledger cannot prove are in
``docs/ledger.md``.  No entry carries content, a file name or an unkeyed hash.
"""

from __future__ import annotations

from .events import (
    ENTRY_VERSION,
    ENTRY_VERSIONS,
    EVENT_FIELDS,
    KINDS,
    LEDGER_EVENTS,
    RESERVED,
    ZERO_HASH,
    EventError,
    check_fields,
    entry_hash,
    validate_event,
)
from .log import CHECKPOINT_EVERY, Ledger, LedgerMissingError, LogState, home_holds_data
from .verify import (
    LedgerReport,
    digest,
    log_section,
    verify_ledger,
    verify_log_continuity,
)

__all__ = ["CHECKPOINT_EVERY", "ENTRY_VERSION", "ENTRY_VERSIONS", "EVENT_FIELDS", "KINDS", "LEDGER_EVENTS",
           "RESERVED", "ZERO_HASH", "EventError", "Ledger", "LedgerMissingError", "LedgerReport", "LogState",
           "check_fields", "digest", "entry_hash", "home_holds_data", "log_section", "validate_event",
           "verify_ledger", "verify_log_continuity"]
