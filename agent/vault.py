"""The encrypted record store: SQLite (WAL) with one AEAD-sealed payload per row.

Terminology
-----------
record
    One JSON-serialisable object stored under an address ``(table, rid)``.
table
    A namespace for records (``audio_features``, ``stays``...).  Table names are
    stored in the clear (they are fixed names in the source; see
    ``docs/vault.md``); rids never are.
address key, AEAD key
    Two 32-byte keys derived from the vault key with HKDF-SHA256 (RFC 5869)
    under distinct ``info`` labels, so no key serves two purposes.
addr
    The on-disk lookup key ``HMAC-SHA256(address key, table \\0 rid)``: opaque
    without the vault key, equal for equal addresses (so ``put`` stays
    idempotent).
seal
    AES-256-GCM under the AEAD key with a fresh random 96-bit nonce over
    ``rid \\0 json``, with ``"lethe-vault/2" \\0 table \\0 addr`` as associated
    data, so a record copied or moved to another address fails to decrypt.

Schema (``HOME/vault.db``, ``PRAGMA user_version = 2``)::

    records(seq INTEGER PRIMARY KEY AUTOINCREMENT, tbl TEXT, addr BLOB(32) UNIQUE,
            nonce BLOB(12), ct BLOB)            -- index (tbl, seq)
    meta(name TEXT PRIMARY KEY, value BLOB)     -- 'key_check': HMAC(address key, fixed text)

The key check exists because keyed addresses would make a wrong key look like
an empty vault; with it a wrong key is an ``IntegrityError`` at open.

``seq`` gives insertion order; an upsert keeps the record's first position.  A
file in the first layout (``user_version`` 0, rids in the clear) is rewritten
to this one on open, in one transaction.  Key handling, what is and is not
hidden, and the limits of deletion are in ``docs/vault.md``.
"""

from __future__ import annotations

import hmac
import json
import os
import contextlib
import sqlite3
import threading
from contextlib import contextmanager
from pathlib import Path
from collections.abc import Iterable, Iterator
from typing import Any

from cryptography.exceptions import InvalidTag
from cryptography.hazmat.primitives import hashes
from cryptography.hazmat.primitives.ciphers.aead import AESGCM
from cryptography.hazmat.primitives.kdf.hkdf import HKDF

from .errors import IntegrityError, StateError, UsageError
from .fsutil import FILE_MODE, fsync_dir
from .home import Home, overwrite_and_unlink

NONCE_BYTES = 12
ADDR_BYTES = 32
SCHEMA_VERSION = 2  # PRAGMA user_version of a current vault.db
_PAGE = 512  # rows fetched per query while iterating

# HKDF info labels: the AEAD key and the address key must never coincide.
_AEAD_INFO = b"lethe vault v2: record sealing key (AES-256-GCM)"
_ADDR_INFO = b"lethe vault v2: record address key (HMAC-SHA256)"
_AAD_PREFIX = b"lethe-vault/2\0"

_SCHEMA = """CREATE TABLE records (
                 seq INTEGER PRIMARY KEY AUTOINCREMENT,
                 tbl TEXT NOT NULL,
                 addr BLOB NOT NULL UNIQUE,
                 nonce BLOB NOT NULL, ct BLOB NOT NULL)"""
_INDEX = "CREATE INDEX records_by_table ON records (tbl, seq)"
_META = "CREATE TABLE meta (name TEXT PRIMARY KEY, value BLOB NOT NULL)"
# No address contains this message: every address message has a NUL in it.
_KEY_CHECK_MSG = b"lethe vault key check"
_COLUMNS = {"seq", "tbl", "addr", "nonce", "ct"}
_LEGACY_COLUMNS = {"seq", "tbl", "rid", "nonce", "ct"}  # layout 1: rids in the clear


def _json_default(obj):
    # numpy is imported lazily: the vault is used by commands that never touch it.
    try:
        import numpy as np
    except ImportError:  # pragma: no cover
        pass
    else:
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


def derive_keys(vault_key: bytes) -> tuple[bytes, bytes]:
    """``(aead_key, address_key)``: HKDF-SHA256 of the vault key, no salt, two info labels."""
    def one(info):
        return HKDF(algorithm=hashes.SHA256(), length=32, salt=None, info=info).derive(bytes(vault_key))

    return one(_AEAD_INFO), one(_ADDR_INFO)


def _aad(table: str, addr: bytes) -> bytes:
    # addr has a fixed length, so the NUL after the table keeps the fields apart
    return _AAD_PREFIX + table.encode("utf-8") + b"\0" + addr


def _legacy_aad(table: str, rid: str) -> bytes:
    return f"{table}\0{rid}".encode()


class Vault:
    """Encrypted records in one SQLite file.

    Parameters
    ----------
    path : path-like
        The database file (created 0600 if missing).
    key : bytes
        32-byte vault key (normally ``Keystore.vault_key()``); the AEAD key and
        the address key are derived from it (:func:`derive_keys`).

    Notes
    -----
    A single connection is shared by all threads of the process behind a
    re-entrant lock, so the watcher's threads can write while another reads.
    Every write outside :meth:`transaction` is its own durable commit.
    Opening checks ``PRAGMA user_version`` first: a newer schema is refused
    (``StateError``), a file in the first layout is migrated.
    """

    def __init__(self, path, key: bytes):
        if not isinstance(key, (bytes, bytearray)) or len(key) != 32:
            raise UsageError("vault: expected a 32-byte key (AES-256-GCM)")
        self.path = Path(path)
        aead_key, self._addr_key = derive_keys(key)
        self._aead = AESGCM(aead_key)
        self._legacy_key: bytes | None = bytes(key)  # only to read a first-layout file once, while migrating it
        self._lock = threading.RLock()
        self._depth = 0
        self._db: sqlite3.Connection | None = None
        self.migrated = 0  # records rewritten from the first layout by this open
        self._connect()
        self._legacy_key = None

    @classmethod
    def open(cls, home=None, passphrase: bytes | None = None) -> Vault:
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
        db = None
        try:
            db = sqlite3.connect(str(self.path), isolation_level=None, check_same_thread=False, timeout=30.0)
            # The version is read before anything writes: a newer file is left untouched.
            self._check_version(db.execute("PRAGMA user_version").fetchone()[0])
            db.execute("PRAGMA journal_mode=WAL")
            db.execute("PRAGMA synchronous=FULL")
            # Freed pages are zeroed so deleted ciphertext does not linger in the
            # main file (the WAL may still hold copies until a checkpoint).
            db.execute("PRAGMA secure_delete=ON")
            self._prepare(db)
        except sqlite3.DatabaseError as e:
            if db is not None:
                db.close()
            raise IntegrityError(f"{self.path}: not a usable vault database ({e})") from None
        except BaseException:
            if db is not None:
                db.close()
            raise
        self._db = db

    def _check_version(self, version: int) -> None:
        if version > SCHEMA_VERSION:
            raise StateError(f"{self.path}: vault schema version {version} is newer than this lethe reads "
                             f"(up to {SCHEMA_VERSION}); upgrade lethe to open it (the file was not changed)")

    def _prepare(self, db: sqlite3.Connection) -> None:
        """Create, check or migrate the schema; several processes may race here."""
        if db.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION:
            self._check_current(db)
            return
        db.execute("BEGIN IMMEDIATE")  # waits (busy timeout) while another process migrates
        try:
            # re-read under the write lock: another process may have just done the work
            version = db.execute("PRAGMA user_version").fetchone()[0]
            self._check_version(version)
            if version != SCHEMA_VERSION:
                names = [n for (n,) in db.execute(
                    "SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%'")]
                columns = {r[1] for r in db.execute("PRAGMA table_info(records)")}
                if not names:
                    db.execute(_SCHEMA)
                    db.execute(_INDEX)
                elif names == ["records"] and columns == _LEGACY_COLUMNS and version == 0:
                    self.migrated = self._migrate_legacy(db)
                    names = []
                if not names:
                    db.execute(_META)
                    db.execute("INSERT INTO meta (name, value) VALUES ('key_check', ?)", (self._key_check(),))
                else:
                    raise IntegrityError(
                        f"{self.path}: not a lethe vault layout (schema version {version}, "
                        f"tables {sorted(names)}); refusing to open it")
                db.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
            else:
                self._check_current(db)
            db.execute("COMMIT")
        except BaseException:
            with contextlib.suppress(sqlite3.Error):  # the original error is the one to report
                db.execute("ROLLBACK")
            raise
        if self.migrated:
            # The first layout's rids may survive in freed pages and in the WAL:
            # rebuild the file and truncate the WAL (best effort, see docs/vault.md).
            try:
                db.execute("VACUUM")
                db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
            except sqlite3.OperationalError:  # pragma: no cover - another process is reading
                pass

    def _key_check(self) -> bytes:
        return hmac.digest(self._addr_key, _KEY_CHECK_MSG, "sha256")

    def _check_current(self, db: sqlite3.Connection) -> None:
        columns = {r[1] for r in db.execute("PRAGMA table_info(records)")}
        if columns != _COLUMNS:
            raise IntegrityError(f"{self.path}: schema version {SCHEMA_VERSION} but the records table has "
                                 f"columns {sorted(columns)}, expected {sorted(_COLUMNS)}")
        try:
            row = db.execute("SELECT value FROM meta WHERE name = 'key_check'").fetchone()
        except sqlite3.OperationalError:
            row = None
        if row is None:
            raise IntegrityError(f"{self.path}: the vault has no key check (meta table damaged or removed)")
        # Keyed addresses make a wrong key look like an empty vault; this check
        # turns that into an error before anything is read or written.
        if not hmac.compare_digest(bytes(row[0]), self._key_check()):
            raise IntegrityError(f"{self.path}: the vault was sealed with another key "
                                 f"(or its key check was altered)")

    def _migrate_legacy(self, db: sqlite3.Connection) -> int:
        """Rewrite first-layout rows (clear rids, raw-key seals) inside the caller's transaction.

        Each row is opened with its old associated data before it is resealed, so
        an altered old file fails here, naming the record, and nothing changes.
        """
        assert self._legacy_key is not None  # set by open() for a first-layout file
        legacy = AESGCM(self._legacy_key)
        db.execute(_SCHEMA.replace("CREATE TABLE records", "CREATE TABLE records_v2"))
        cur = db.execute("SELECT seq, tbl, rid, nonce, ct FROM records ORDER BY seq")
        n = 0
        while True:
            rows = cur.fetchmany(_PAGE)
            if not rows:
                break
            out = []
            for seq, table, rid, nonce, ct in rows:
                try:
                    data = legacy.decrypt(nonce, ct, _legacy_aad(table, rid))
                except InvalidTag:
                    raise IntegrityError(
                        f"{self.path}: first-layout record {table!r}/{rid!r} fails authentication while "
                        f"migrating: it was altered or sealed with another key; nothing was changed") from None
                addr = self._addr(table, rid)
                nonce2, ct2 = self._seal_bytes(table, rid, addr, data)
                out.append((seq, table, addr, nonce2, ct2))
            db.executemany("INSERT INTO records_v2 (seq, tbl, addr, nonce, ct) VALUES (?, ?, ?, ?, ?)", out)
            n += len(out)
        db.execute("DROP TABLE records")
        db.execute("ALTER TABLE records_v2 RENAME TO records")
        db.execute(_INDEX)
        return n

    def _conn(self) -> sqlite3.Connection:
        if self._db is None:
            raise StateError(f"{self.path}: the vault is closed")
        return self._db

    # -- sealing -------------------------------------------------------------
    def _addr(self, table: str, rid: str) -> bytes:
        return hmac.digest(self._addr_key, f"{table}\0{rid}".encode(), "sha256")

    def _seal_bytes(self, table: str, rid: str, addr: bytes, data: bytes) -> tuple[bytes, bytes]:
        nonce = os.urandom(NONCE_BYTES)
        return nonce, self._aead.encrypt(nonce, rid.encode("utf-8") + b"\0" + data, _aad(table, addr))

    def _seal(self, table: str, rid: str, obj) -> tuple[bytes, bytes, bytes]:
        addr = self._addr(table, rid)
        return (addr, *self._seal_bytes(table, rid, addr, encode(obj)))

    def _open(self, table: str, addr: bytes, nonce: bytes, ct: bytes, rid: str | None = None):
        """``(rid, obj)`` of a stored row; ``rid`` (when known) only names it in errors."""
        where = repr(rid) if rid is not None else f"address {bytes(addr)[:8].hex()}"
        try:
            data = self._aead.decrypt(nonce, ct, _aad(table, bytes(addr)))
        except InvalidTag:
            raise IntegrityError(f"{self.path}: record {table!r}/{where} fails authentication: it was altered, "
                                 f"moved from another address, or sealed with another key") from None
        head, sep, body = data.partition(b"\0")
        sealed_rid = head.decode("utf-8")
        # only a sealing bug (the key is needed to forge) could make these differ
        if not sep or not hmac.compare_digest(self._addr(table, sealed_rid), bytes(addr)):
            raise IntegrityError(f"{self.path}: record {table!r}/{where}: the rid sealed inside does not "
                                 f"match its address")
        return sealed_rid, json.loads(body)

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
        addr, nonce, ct = self._seal(table, rid, obj)
        with self._lock:
            cur = self._conn().execute(
                "INSERT INTO records (tbl, addr, nonce, ct) VALUES (?, ?, ?, ?) ON CONFLICT (addr) DO NOTHING",
                (table, addr, nonce, ct))
            return cur.rowcount == 1

    def put_many(self, table: str, rows: Iterable[tuple[str, object]]) -> int:
        """Store many new records in one commit; returns how many were new."""
        sealed = []
        for rid, obj in rows:
            _check_address(table, rid)
            sealed.append((table, *self._seal(table, rid, obj)))
        if not sealed:
            return 0
        with self.transaction():
            before = self._conn().total_changes
            self._conn().executemany(
                "INSERT INTO records (tbl, addr, nonce, ct) VALUES (?, ?, ?, ?) ON CONFLICT (addr) DO NOTHING",
                sealed)
            return self._conn().total_changes - before

    def upsert(self, table: str, rid: str, obj) -> None:
        """Store or replace a record (a fresh nonce each time; first position kept)."""
        _check_address(table, rid)
        addr, nonce, ct = self._seal(table, rid, obj)
        with self._lock:
            self._conn().execute(
                "INSERT INTO records (tbl, addr, nonce, ct) VALUES (?, ?, ?, ?) "
                "ON CONFLICT (addr) DO UPDATE SET nonce = excluded.nonce, ct = excluded.ct",
                (table, addr, nonce, ct))

    def delete(self, table: str, rid: str) -> bool:
        """Remove one record; returns whether it existed."""
        _check_address(table, rid)
        with self._lock:
            cur = self._conn().execute("DELETE FROM records WHERE addr = ?", (self._addr(table, rid),))
            return cur.rowcount == 1

    def delete_many(self, table: str, rids: Iterable[str]) -> int:
        """Remove several records in one commit; returns how many existed."""
        rids = list(rids)
        for rid in rids:
            _check_address(table, rid)
        with self.transaction():
            before = self._conn().total_changes
            self._conn().executemany("DELETE FROM records WHERE addr = ?", [(self._addr(table, r),) for r in rids])
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
        addr = self._addr(table, rid)
        with self._lock:
            row = self._conn().execute("SELECT tbl, nonce, ct FROM records WHERE addr = ?", (addr,)).fetchone()
        if row is None:
            return default
        # the row's own table goes into the associated data: a relabelled row fails
        return self._open(row[0], addr, row[1], row[2], rid=rid)[1]

    def __contains__(self, address) -> bool:
        table, rid = address
        try:
            _check_address(table, rid)
        except UsageError:
            return False  # no record can live at an invalid address
        with self._lock:
            return self._conn().execute("SELECT 1 FROM records WHERE addr = ?",
                                        (self._addr(table, rid),)).fetchone() is not None

    def items(self, table: str) -> Iterator[tuple[str, Any]]:  # payloads are any JSON value
        """``(rid, obj)`` pairs in insertion order.

        Rows are fetched a page at a time, so the caller may write to the vault
        while iterating; records added meanwhile appear at the end.
        """
        _check_address(table, "-")
        last = -1
        while True:
            with self._lock:
                rows = self._conn().execute(
                    "SELECT seq, addr, nonce, ct FROM records WHERE tbl = ? AND seq > ? ORDER BY seq LIMIT ?",
                    (table, last, _PAGE)).fetchall()
            if not rows:
                return
            for _seq, addr, nonce, ct in rows:
                yield self._open(table, addr, nonce, ct)
            last = rows[-1][0]

    def rids(self, table: str) -> list[str]:
        """The record ids of a table in insertion order.

        Rids are sealed with their payloads, so this decrypts the whole table.
        """
        return [rid for rid, _ in self.items(table)]

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
        except (sqlite3.Error, AttributeError):
            pass

    def __repr__(self):
        return f"Vault({str(self.path)!r}{', closed' if self._db is None else ''})"


__all__ = ["Vault", "encode", "derive_keys", "NONCE_BYTES", "ADDR_BYTES", "SCHEMA_VERSION"]
