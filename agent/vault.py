"""The encrypted record store: SQLite (WAL) with one AEAD-sealed payload per row.

Terminology
-----------
record
    One JSON-serialisable object stored under an address ``(table, rid)``.
table
    A namespace for records (``audio_features``, ``stays``...).  Table names and
    rids are stored in the clear so that lookups work; payloads never are.
seal
    AES-256-GCM under the vault key with a fresh random 96-bit nonce and the
    record's address ``f"{table}\\0{rid}"`` as associated data, so a record
    copied or moved to another address fails to decrypt.

Schema (``HOME/vault.db``)::

    records(seq INTEGER PRIMARY KEY AUTOINCREMENT, tbl TEXT, rid TEXT,
            nonce BLOB(12), ct BLOB, UNIQUE(tbl, rid))

``seq`` gives insertion order; an upsert keeps the record's first position.
Key handling, what is and is not hidden, and the limits of deletion are in
``docs/vault.md``.
"""

from __future__ import annotations

import json
import os
import sqlite3
import threading
from contextlib import contextmanager
from pathlib import Path
from typing import Iterable, Iterator

from cryptography.exceptions import InvalidTag
from cryptography.hazmat.primitives.ciphers.aead import AESGCM

from .errors import IntegrityError, StateError, UsageError
from .home import FILE_MODE, Home, fsync_dir, overwrite_and_unlink

NONCE_BYTES = 12
_PAGE = 512  # rows fetched per query while iterating


def _json_default(obj):
    # numpy is imported lazily: the vault is used by commands that never touch it.
    try:
        import numpy as np
    except ImportError:  # pragma: no cover
        np = None
    if np is not None:
        if isinstance(obj, np.ndarray):
            return obj.tolist()
        if isinstance(obj, np.generic):
            return obj.item()
    if isinstance(obj, (set, frozenset)):
        return sorted(obj)
    if isinstance(obj, (bytes, bytearray)):
        raise TypeError("bytes are not JSON; encode them (hex, base64) before storing")
    raise TypeError(f"object of type {type(obj).__name__} is not JSON-serialisable")


def encode(obj) -> bytes:
    """The JSON bytes a payload is sealed as (numpy scalars and arrays converted)."""
    try:
        return json.dumps(obj, default=_json_default, separators=(",", ":"), ensure_ascii=False).encode("utf-8")
    except (TypeError, ValueError) as e:
        raise UsageError(f"vault: payload cannot be stored: {e}") from None


def _check_address(table, rid) -> None:
    if not isinstance(table, str) or not table or "\0" in table:
        raise UsageError(f"vault: table must be a non-empty string without NUL, got {table!r}")
    if not isinstance(rid, str) or not rid or "\0" in rid:
        raise UsageError(f"vault: rid must be a non-empty string without NUL, got {type(rid).__name__}")


def _aad(table: str, rid: str) -> bytes:
    return f"{table}\0{rid}".encode("utf-8")


class Vault:
    """Encrypted records in one SQLite file.

    Parameters
    ----------
    path : path-like
        The database file (created 0600 if missing).
    key : bytes
        32-byte AES-256-GCM key (normally ``Keystore.vault_key()``).

    Notes
    -----
    A single connection is shared by all threads of the process behind a
    re-entrant lock, so the watcher's threads can write while another reads.
    Every write outside :meth:`transaction` is its own durable commit.
    """

    def __init__(self, path, key: bytes):
        if not isinstance(key, (bytes, bytearray)) or len(key) != 32:
            raise UsageError("vault: expected a 32-byte key (AES-256-GCM)")
        self.path = Path(path)
        self._aead = AESGCM(bytes(key))
        self._lock = threading.RLock()
        self._depth = 0
        self._db = None
        self._connect()

    @classmethod
    def open(cls, home=None, passphrase: bytes | None = None) -> "Vault":
        """Open (creating if needed) the vault of a home, with the home's keystore."""
        from .keystore import Keystore

        home = home if isinstance(home, Home) else Home(home)
        ks = Keystore(home, passphrase).ensure()
        return cls(home.vault_path, ks.vault_key())

    def _connect(self) -> None:
        self.path.parent.mkdir(parents=True, exist_ok=True, mode=0o700)
        if not self.path.exists():
            # Created here with 0600 so SQLite's -wal and -shm files, which
            # copy the database's mode, are private too.
            fd = os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW, FILE_MODE)
            os.close(fd)
            fsync_dir(self.path.parent)
        elif self.path.is_symlink():
            raise StateError(f"{self.path}: the vault is a symlink; refusing to open it")
        try:
            db = sqlite3.connect(str(self.path), isolation_level=None, check_same_thread=False, timeout=30.0)
            db.execute("PRAGMA journal_mode=WAL")
            db.execute("PRAGMA synchronous=FULL")
            # Freed pages are zeroed so deleted ciphertext does not linger in the
            # main file (the WAL may still hold copies until a checkpoint).
            db.execute("PRAGMA secure_delete=ON")
            db.execute("""CREATE TABLE IF NOT EXISTS records (
                              seq INTEGER PRIMARY KEY AUTOINCREMENT,
                              tbl TEXT NOT NULL, rid TEXT NOT NULL,
                              nonce BLOB NOT NULL, ct BLOB NOT NULL,
                              UNIQUE (tbl, rid))""")
        except sqlite3.DatabaseError as e:
            raise IntegrityError(f"{self.path}: not a usable vault database ({e})") from None
        self._db = db

    def _conn(self) -> sqlite3.Connection:
        if self._db is None:
            raise StateError(f"{self.path}: the vault is closed")
        return self._db

    # -- sealing -------------------------------------------------------------
    def _seal(self, table: str, rid: str, obj) -> tuple[bytes, bytes]:
        nonce = os.urandom(NONCE_BYTES)
        return nonce, self._aead.encrypt(nonce, encode(obj), _aad(table, rid))

    def _open(self, table: str, rid: str, nonce: bytes, ct: bytes):
        try:
            data = self._aead.decrypt(nonce, ct, _aad(table, rid))
        except InvalidTag:
            raise IntegrityError(f"{self.path}: record {table!r}/{rid!r} fails authentication: it was altered, "
                                 f"moved from another address, or sealed with another key") from None
        return json.loads(data)

    # -- transactions --------------------------------------------------------
    @contextmanager
    def transaction(self):
        """One durable commit for everything inside; nested uses become savepoints.

        An exception rolls back the innermost level and propagates.
        """
        with self._lock:
            db = self._conn()
            depth = self._depth
            if depth == 0:
                db.execute("BEGIN IMMEDIATE")
            else:
                db.execute(f"SAVEPOINT sp{depth}")
            self._depth += 1
            try:
                yield self
            except BaseException:
                self._depth -= 1
                if depth == 0:
                    db.execute("ROLLBACK")
                else:
                    db.execute(f"ROLLBACK TO sp{depth}")
                    db.execute(f"RELEASE sp{depth}")
                raise
            self._depth -= 1
            if depth == 0:
                db.execute("COMMIT")
            else:
                db.execute(f"RELEASE sp{depth}")

    # -- writing -------------------------------------------------------------
    def put(self, table: str, rid: str, obj) -> bool:
        """Store a new record; returns False (and writes nothing) if the address is taken."""
        _check_address(table, rid)
        nonce, ct = self._seal(table, rid, obj)
        with self._lock:
            cur = self._conn().execute(
                "INSERT INTO records (tbl, rid, nonce, ct) VALUES (?, ?, ?, ?) ON CONFLICT (tbl, rid) DO NOTHING",
                (table, rid, nonce, ct))
            return cur.rowcount == 1

    def put_many(self, table: str, rows: Iterable[tuple[str, object]]) -> int:
        """Store many new records in one commit; returns how many were new."""
        sealed = []
        for rid, obj in rows:
            _check_address(table, rid)
            sealed.append((table, rid, *self._seal(table, rid, obj)))
        if not sealed:
            return 0
        with self.transaction():
            before = self._conn().total_changes
            self._conn().executemany(
                "INSERT INTO records (tbl, rid, nonce, ct) VALUES (?, ?, ?, ?) ON CONFLICT (tbl, rid) DO NOTHING",
                sealed)
            return self._conn().total_changes - before

    def upsert(self, table: str, rid: str, obj) -> None:
        """Store or replace a record (a fresh nonce each time; first position kept)."""
        _check_address(table, rid)
        nonce, ct = self._seal(table, rid, obj)
        with self._lock:
            self._conn().execute(
                "INSERT INTO records (tbl, rid, nonce, ct) VALUES (?, ?, ?, ?) "
                "ON CONFLICT (tbl, rid) DO UPDATE SET nonce = excluded.nonce, ct = excluded.ct",
                (table, rid, nonce, ct))

    def delete(self, table: str, rid: str) -> bool:
        """Remove one record; returns whether it existed."""
        _check_address(table, rid)
        with self._lock:
            cur = self._conn().execute("DELETE FROM records WHERE tbl = ? AND rid = ?", (table, rid))
            return cur.rowcount == 1

    def delete_many(self, table: str, rids: Iterable[str]) -> int:
        """Remove several records in one commit; returns how many existed."""
        rids = list(rids)
        for rid in rids:
            _check_address(table, rid)
        with self.transaction():
            before = self._conn().total_changes
            self._conn().executemany("DELETE FROM records WHERE tbl = ? AND rid = ?", [(table, r) for r in rids])
            return self._conn().total_changes - before

    def clear(self, table: str) -> int:
        """Remove every record of a table; returns how many there were."""
        _check_address(table, "-")
        with self._lock:
            return self._conn().execute("DELETE FROM records WHERE tbl = ?", (table,)).rowcount

    # -- reading -------------------------------------------------------------
    def get(self, table: str, rid: str, default=None):
        """The record at ``(table, rid)``, or ``default`` when there is none."""
        _check_address(table, rid)
        with self._lock:
            row = self._conn().execute("SELECT nonce, ct FROM records WHERE tbl = ? AND rid = ?",
                                       (table, rid)).fetchone()
        if row is None:
            return default
        return self._open(table, rid, row[0], row[1])

    def __contains__(self, address) -> bool:
        table, rid = address
        with self._lock:
            return self._conn().execute("SELECT 1 FROM records WHERE tbl = ? AND rid = ?",
                                        (table, rid)).fetchone() is not None

    def items(self, table: str) -> Iterator[tuple[str, object]]:
        """``(rid, obj)`` pairs in insertion order.

        Rows are fetched a page at a time, so the caller may write to the vault
        while iterating; records added meanwhile appear at the end.
        """
        _check_address(table, "-")
        last = -1
        while True:
            with self._lock:
                rows = self._conn().execute(
                    "SELECT seq, rid, nonce, ct FROM records WHERE tbl = ? AND seq > ? ORDER BY seq LIMIT ?",
                    (table, last, _PAGE)).fetchall()
            if not rows:
                return
            for seq, rid, nonce, ct in rows:
                yield rid, self._open(table, rid, nonce, ct)
            last = rows[-1][0]

    def rids(self, table: str) -> list[str]:
        """The record ids of a table in insertion order (nothing is decrypted)."""
        _check_address(table, "-")
        with self._lock:
            return [r for (r,) in self._conn().execute(
                "SELECT rid FROM records WHERE tbl = ? ORDER BY seq", (table,))]

    def count(self, table: str) -> int:
        _check_address(table, "-")
        with self._lock:
            return self._conn().execute("SELECT COUNT(*) FROM records WHERE tbl = ?", (table,)).fetchone()[0]

    def tables(self) -> dict[str, int]:
        """Table name -> number of records (names and counts are not secret; see docs/vault.md)."""
        with self._lock:
            return dict(self._conn().execute("SELECT tbl, COUNT(*) FROM records GROUP BY tbl ORDER BY tbl"))

    # -- lifecycle -----------------------------------------------------------
    def checkpoint(self) -> None:
        """Fold the WAL into the main file and truncate it (old page copies go with it)."""
        with self._lock:
            self._conn().execute("PRAGMA wal_checkpoint(TRUNCATE)")

    def close(self) -> None:
        with self._lock:
            if self._db is None:
                return
            if self._depth:
                raise StateError(f"{self.path}: cannot close the vault inside a transaction")
            try:
                # Do not wait long for another connection's write lock on the way out.
                self._db.execute("PRAGMA busy_timeout = 200")
                self._db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
            except sqlite3.Error:
                pass  # another connection may be reading; SQLite checkpoints later
            self._db.close()
            self._db = None

    def destroy(self) -> int:
        """Close, then overwrite and unlink the database and its -wal/-shm files.

        Returns the number of files removed.  Overwriting is best effort (see
        ``docs/vault.md``); destroying the keystore is what makes leftovers
        unreadable.
        """
        self.close()
        removed = 0
        for suffix in ("", "-wal", "-shm", "-journal"):
            p = Path(str(self.path) + suffix)
            if p.exists() or p.is_symlink():
                overwrite_and_unlink(p)
                removed += 1
        fsync_dir(self.path.parent)
        return removed

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def __del__(self):  # pragma: no cover - best effort at interpreter exit
        try:
            if self._db is not None and not self._depth:
                self._db.close()
        except Exception:
            pass

    def __repr__(self):
        return f"Vault({str(self.path)!r}{', closed' if self._db is None else ''})"


__all__ = ["Vault", "encode", "NONCE_BYTES"]
