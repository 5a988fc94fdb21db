"""The encrypted record store: round trips, AEAD binding, opaque addresses, idempotence,
durability, transactions, permissions, schema versions, migration from the first layout
and the absence of plaintext (payloads and rids) on disk."""

from __future__ import annotations

import hashlib
import hmac
import json
import os
import sqlite3
import stat
import threading
from pathlib import Path

import cryptography_vectors
import numpy as np
import pytest
from cryptography.hazmat.primitives.ciphers.aead import AESGCM

from agent.errors import IntegrityError, StateError, UsageError
from agent.keystore import Keystore
from agent.vault import SCHEMA_VERSION, Vault, derive_keys

MARKER = "zz-plaintext-marker-4711"


@pytest.fixture
def vault(home):
    v = Vault.open(home)
    yield v
    v.close()


def _raw(home):
    return sqlite3.connect(str(home.vault_path))


# -- round trips -------------------------------------------------------------------

def test_round_trip_plain_objects(vault):
    obj = {"t": 1761350400.5, "ratings": {"calm": 5}, "ok": True, "none": None, "list": [1, "a"]}
    assert vault.put("mood_reports", "abc:0", obj) is True
    assert vault.get("mood_reports", "abc:0") == obj


def test_round_trip_converts_numpy(vault):
    obj = {"vec": np.linspace(0, 1, 5, dtype=np.float32), "n": np.int64(7), "x": np.float64(0.25),
           "m": np.eye(2)}
    vault.put("audio_features", "id1", obj)
    got = vault.get("audio_features", "id1")
    assert got["n"] == 7 and got["x"] == 0.25 and got["m"] == [[1.0, 0.0], [0.0, 1.0]]
    np.testing.assert_allclose(got["vec"], np.linspace(0, 1, 5), rtol=1e-6)


def test_get_missing_returns_default(vault):
    assert vault.get("stays", "nope") is None
    assert vault.get("stays", "nope", default={}) == {}


def test_unserialisable_payload_is_refused(vault):
    with pytest.raises(UsageError, match="payload cannot be stored"):
        vault.put("x", "1", {"b": object()})


def test_bad_address_is_refused(vault):
    with pytest.raises(UsageError, match="rid must be a non-empty string"):
        vault.put("x", 1, {})
    with pytest.raises(UsageError, match="table must be a non-empty string"):
        vault.put("", "1", {})


def test_survives_reopen(home):
    with Vault.open(home) as v:
        v.put("stays", "100", {"n": 3})
    with Vault.open(home) as v:
        assert v.get("stays", "100") == {"n": 3}


# -- idempotence and order ---------------------------------------------------------

def test_put_is_idempotent(vault):
    assert vault.put("audio_features", "id", {"v": 1}) is True
    assert vault.put("audio_features", "id", {"v": 2}) is False
    assert vault.get("audio_features", "id") == {"v": 1}
    assert vault.count("audio_features") == 1


def test_put_many_counts_only_new_rows(vault):
    assert vault.put_many("gps_fixes", [(f"i:{k}", {"k": k}) for k in range(10)]) == 10
    assert vault.put_many("gps_fixes", [(f"i:{k}", {"k": -1}) for k in range(5, 15)]) == 5
    assert vault.count("gps_fixes") == 15
    assert vault.get("gps_fixes", "i:7") == {"k": 7}


def test_put_many_empty(vault):
    assert vault.put_many("gps_fixes", []) == 0


def test_items_in_insertion_order(vault):
    rids = ["b", "a", "c", "10", "2"]
    for r in rids:
        vault.put("t", r, {"r": r})
    assert [r for r, _ in vault.items("t")] == rids
    assert vault.rids("t") == rids


def test_items_pages_through_large_tables(vault):
    vault.put_many("t", [(str(i), i) for i in range(1500)])
    assert [obj for _, obj in vault.items("t")] == list(range(1500))


def test_upsert_replaces_and_keeps_position(vault):
    vault.put("t", "a", 1)
    vault.put("t", "b", 2)
    vault.upsert("t", "a", 10)
    vault.upsert("t", "c", 3)
    assert list(vault.items("t")) == [("a", 10), ("b", 2), ("c", 3)]


def test_delete_clear_count_tables(vault):
    vault.put_many("a", [("1", 1), ("2", 2), ("3", 3)])
    vault.put("b", "1", 1)
    assert vault.delete("a", "2") is True and vault.delete("a", "2") is False
    assert vault.tables() == {"a": 2, "b": 1}
    assert vault.delete_many("a", ["1", "9"]) == 1
    assert vault.clear("b") == 1
    assert vault.count("b") == 0 and vault.tables() == {"a": 1}


# -- AEAD ------------------------------------------------------------------------------

def _copy_record(home, vault, src, dst_table, dst_rid):
    db = _raw(home)
    nonce, ct = db.execute("SELECT nonce, ct FROM records WHERE addr = ?", (vault._addr(*src),)).fetchone()
    db.execute("INSERT INTO records (tbl, addr, nonce, ct) VALUES (?, ?, ?, ?)",
               (dst_table, vault._addr(dst_table, dst_rid), nonce, ct))
    db.commit()
    db.close()


def test_record_copied_to_another_rid_fails(home, vault):
    vault.put("audio_features", "aaa", {"v": 1})
    _copy_record(home, vault, ("audio_features", "aaa"), "audio_features", "bbb")
    with pytest.raises(IntegrityError, match="record 'audio_features'/'bbb' fails authentication"):
        vault.get("audio_features", "bbb")


def test_record_moved_to_another_table_fails(home, vault):
    vault.put("stays", "100", {"lat": 1})
    _copy_record(home, vault, ("stays", "100"), "coded", "100")
    with pytest.raises(IntegrityError, match="record 'coded'/'100'"):
        vault.get("coded", "100")


def test_table_rid_boundary_is_unambiguous(home, vault):
    # "ab" + "c" and "a" + "bc" must not share associated data (the NUL separator).
    vault.put("ab", "c", 1)
    _copy_record(home, vault, ("ab", "c"), "a", "bc")
    with pytest.raises(IntegrityError):
        vault.get("a", "bc")


def test_flipped_ciphertext_bit_fails(home, vault):
    vault.put("t", "r", {"v": 1})
    db = _raw(home)
    ct = bytearray(db.execute("SELECT ct FROM records").fetchone()[0])
    ct[3] ^= 0x01
    db.execute("UPDATE records SET ct = ?", (bytes(ct),))
    db.commit()
    db.close()
    with pytest.raises(IntegrityError, match="record 't'/'r' fails authentication"):
        vault.get("t", "r")


def test_wrong_key_fails(home, vault):
    # keyed addresses would make a wrong key look like an empty vault; the key check refuses it
    vault.put("t", "r", {"v": 1})
    with pytest.raises(IntegrityError, match="vault.db: the vault was sealed with another key"):
        Vault(home.vault_path, os.urandom(32))


def test_swapped_payloads_fail(home, vault):
    vault.put("stays", "1761350400", {"n": 1})
    vault.put("stays", "1761354000", {"n": 2})
    a, b = vault._addr("stays", "1761350400"), vault._addr("stays", "1761354000")
    db = _raw(home)
    row_b = db.execute("SELECT nonce, ct FROM records WHERE addr = ?", (b,)).fetchone()
    db.execute("UPDATE records SET nonce = ?, ct = ? WHERE addr = ?", (*row_b, a))
    db.commit()
    db.close()
    with pytest.raises(IntegrityError, match="record 'stays'/'1761350400' fails authentication"):
        vault.get("stays", "1761350400")


def test_relabelled_table_column_fails(home, vault):
    # the row's own table goes into the associated data, so editing tbl breaks the seal
    vault.put("stays", "1761350400", {"n": 1})
    db = _raw(home)
    db.execute("UPDATE records SET tbl = 'coded'")
    db.commit()
    db.close()
    with pytest.raises(IntegrityError, match="record 'coded'/'1761350400' fails authentication"):
        vault.get("stays", "1761350400")


def test_items_names_table_and_address_of_a_bad_record(home, vault):
    vault.put("episodes", "2026-10-25T01:00+01:00", {"n": 1})
    addr = vault._addr("episodes", "2026-10-25T01:00+01:00")
    db = _raw(home)
    db.execute("UPDATE records SET nonce = ?", (os.urandom(12),))
    db.commit()
    db.close()
    with pytest.raises(IntegrityError, match=f"record 'episodes'/address {addr[:8].hex()} fails authentication"):
        list(vault.items("episodes"))


def test_missing_key_check_is_refused(home, vault):
    vault.put("t", "r", 1)
    vault.close()
    db = _raw(home)
    db.execute("DELETE FROM meta")
    db.commit()
    db.close()
    with pytest.raises(IntegrityError, match="vault.db: the vault has no key check"):
        Vault.open(home)


def test_nonces_are_unique_and_ciphertexts_differ(home, vault):
    vault.put_many("t", [(str(i), {"same": "payload"}) for i in range(2000)])
    db = _raw(home)
    rows = db.execute("SELECT nonce, ct FROM records").fetchall()
    db.close()
    nonces = [n for n, _ in rows]
    assert all(len(n) == 12 for n in nonces)  # 96-bit nonces (NIST SP 800-38D)
    assert len(set(nonces)) == len(nonces)
    assert len({ct for _, ct in rows}) == len(rows)


def test_upsert_uses_a_fresh_nonce(home, vault):
    vault.put("t", "r", 1)
    db = _raw(home)
    n1 = db.execute("SELECT nonce FROM records").fetchone()[0]
    vault.upsert("t", "r", 1)
    n2 = db.execute("SELECT nonce FROM records").fetchone()[0]
    db.close()
    assert n1 != n2


def test_no_plaintext_payload_on_disk(home, vault):
    vault.put_many("mood_reports", [(f"m:{i}", {"note": MARKER, "lat": 38.7}) for i in range(50)])
    vault.upsert("mood_reports", "m:0", {"note": MARKER * 2})
    vault.delete("mood_reports", "m:1")
    files = [p for p in home.root.iterdir() if p.name.startswith("vault.db")]
    assert any(p.name.endswith("-wal") for p in files)  # checked while the WAL is live
    for p in files:
        assert MARKER.encode() not in p.read_bytes(), p.name
    vault.close()
    assert MARKER.encode() not in home.vault_path.read_bytes()


# -- transactions ----------------------------------------------------------------------

def test_transaction_rolls_back_on_error(vault):
    with pytest.raises(RuntimeError):
        with vault.transaction():
            vault.put("t", "a", 1)
            raise RuntimeError("boom")
    assert vault.count("t") == 0


def test_nested_transaction_failure_keeps_outer_writes(vault):
    with vault.transaction():
        vault.put("t", "outer", 1)
        with pytest.raises(KeyError):
            with vault.transaction():
                vault.put("t", "inner", 2)
                raise KeyError("inner fails")
        vault.put("t", "after", 3)
    assert vault.rids("t") == ["outer", "after"]


def test_nested_transaction_commits_with_outer(vault):
    with vault.transaction():
        with vault.transaction():
            vault.put("t", "a", 1)
        vault.put_many("t", [("b", 2)])  # put_many nests its own transaction
    assert vault.rids("t") == ["a", "b"]


def test_outer_failure_undoes_inner(vault):
    with pytest.raises(ValueError):
        with vault.transaction():
            with vault.transaction():
                vault.put("t", "a", 1)
            raise ValueError
    assert vault.count("t") == 0


def test_uncommitted_transaction_is_invisible_to_another_connection(home, vault):
    with vault.transaction():
        vault.put("t", "a", 1)
        other = Vault(home.vault_path, Keystore(home).vault_key())
        assert other.count("t") == 0
        other.close()
    other = Vault(home.vault_path, Keystore(home).vault_key())
    assert other.count("t") == 1
    other.close()


def test_concurrent_puts_from_threads(vault):
    def work(k):
        for i in range(50):
            vault.put("t", f"{k}:{i}", i)

    threads = [threading.Thread(target=work, args=(k,)) for k in range(6)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert vault.count("t") == 300


def test_pragmas(home, vault):
    db = vault._conn()
    assert db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert db.execute("PRAGMA synchronous").fetchone()[0] == 2  # FULL (SQLite docs)


# -- files and lifecycle --------------------------------------------------------------

def test_database_files_are_private(home, vault):
    vault.put("t", "a", 1)
    for suffix in ("", "-wal", "-shm"):
        p = home.root / f"vault.db{suffix}"
        assert p.exists(), suffix
        assert stat.S_IMODE(os.stat(p).st_mode) == 0o600, suffix


def test_closed_vault_refuses_use(home):
    v = Vault.open(home)
    v.close()
    with pytest.raises(StateError, match="the vault is closed"):
        v.get("t", "a")


def test_context_manager_closes(home):
    with Vault.open(home) as v:
        v.put("t", "a", 1)
    assert v._db is None


def test_destroy_removes_database_files(home):
    v = Vault.open(home)
    v.put("t", "a", 1)
    assert v.destroy() >= 1
    assert not [p for p in home.root.iterdir() if p.name.startswith("vault.db")]


def test_open_with_passphrase(home, monkeypatch):
    from agent import keystore

    monkeypatch.setattr(keystore, "SCRYPT_N", 2 ** 10)
    with Vault.open(home, passphrase=b"pw") as v:
        v.put("t", "a", {"x": 1})
    with Vault.open(home, passphrase=b"pw") as v:
        assert v.get("t", "a") == {"x": 1}


def test_not_a_database_is_an_integrity_error(home):
    home.vault_path.write_bytes(b"this is not sqlite" * 100)
    with pytest.raises(IntegrityError, match="vault.db: not a usable vault database"):
        Vault(home.vault_path, os.urandom(32))


def test_symlinked_vault_is_refused(home, tmp_path):
    target = tmp_path / "elsewhere.db"
    target.write_bytes(b"")
    home.vault_path.symlink_to(target)
    with pytest.raises(StateError, match="symlink"):
        Vault(home.vault_path, os.urandom(32))


def test_key_must_be_32_bytes(home):
    with pytest.raises(UsageError, match="32-byte key"):
        Vault(home.vault_path, b"short")
