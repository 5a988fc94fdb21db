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
    with pytest.raises(RuntimeError), vault.transaction():
        vault.put("t", "a", 1)
        raise RuntimeError("boom")
    assert vault.count("t") == 0


def test_nested_transaction_failure_keeps_outer_writes(vault):
    with vault.transaction():
        vault.put("t", "outer", 1)
        with pytest.raises(KeyError), vault.transaction():
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
    with pytest.raises(ValueError), vault.transaction():
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


# -- opaque addresses ------------------------------------------------------------------

# rids that are times or counters: none of them may be readable from the files
TIME_RIDS = {"episodes": "2026-10-25T01:00+01:00", "stays": "1761350400", "gps_fixes": "item0042:17"}


def _vault_bytes(home) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in home.root.iterdir() if p.name.startswith("vault.db")}


def _assert_no_rid_bytes(files: dict[str, bytes]) -> None:
    for name, data in files.items():
        for rid in TIME_RIDS.values():
            assert rid.encode() not in data, (name, rid)
        assert b"2026-10-25" not in data, name  # not even the date part of the hour key
        assert b"17613504" not in data, name  # nor the leading digits of the start time


def test_no_rid_in_database_or_wal(home, vault):
    for table, rid in TIME_RIDS.items():
        vault.put(table, rid, {"n": 1})
        vault.upsert(table, rid, {"n": 2})
    vault.put("stays", "1761350401", {"n": 3})
    vault.delete("stays", "1761350401")
    files = _vault_bytes(home)
    assert len(files.get("vault.db-wal", b"")) > 0  # checked while the WAL holds the writes
    _assert_no_rid_bytes(files)
    vault.close()
    _assert_no_rid_bytes(_vault_bytes(home))


def test_rids_still_come_back_in_order(vault):
    rids = ["2026-10-25T01:00+01:00", "2026-10-25T01:00+00:00", "2026-10-25T02:00+00:00"]
    for r in rids:
        vault.put("episodes", r, {"key": r})
    assert vault.rids("episodes") == rids
    assert [obj["key"] for _, obj in vault.items("episodes")] == rids
    assert ("episodes", rids[1]) in vault and ("episodes", "2026-10-25T03:00+00:00") not in vault


def test_the_same_rid_in_two_tables_has_two_addresses(vault):
    vault.put("stays", "1761350400", {"t": "stay"})
    assert vault.put("coded", "1761350400", {"t": "coded"}) is True
    assert vault.get("stays", "1761350400") == {"t": "stay"}
    assert vault.get("coded", "1761350400") == {"t": "coded"}


def _rfc5869(ikm: bytes, salt: bytes, info: bytes, length: int) -> bytes:
    # RFC 5869 section 2.2 (extract) and 2.3 (expand), written out with hmac
    prk = hmac.new(salt or bytes(32), ikm, hashlib.sha256).digest()
    okm, block, i = b"", b"", 1
    while len(okm) < length:
        block = hmac.new(prk, block + info + bytes([i]), hashlib.sha256).digest()
        okm, i = okm + block, i + 1
    return okm[:length]


def _rfc5869_cases():
    text = (Path(cryptography_vectors.__file__).parent / "KDF" / "rfc-5869-HKDF-SHA256.txt").read_text()
    cases, cur = [], {}
    for line in text.splitlines():
        if "=" in line and not line.startswith("#"):
            k, v = (x.strip() for x in line.split("=", 1))
            cur[k] = v
            if k == "OKM":
                cases.append(cur)
                cur = {}
    return cases


def test_reference_hkdf_matches_rfc_5869_vectors():
    # RFC 5869 appendix A.1-A.3, via cryptography_vectors KDF/rfc-5869-HKDF-SHA256.txt
    cases = _rfc5869_cases()
    assert len(cases) >= 3
    for c in cases:
        got = _rfc5869(bytes.fromhex(c["IKM"]), bytes.fromhex(c["salt"]), bytes.fromhex(c["info"]), int(c["L"]))
        assert got.hex() == c["OKM"].lower()


def test_on_disk_format_matches_the_documented_contract(home, vault):
    # docs/vault.md: k = HKDF-SHA256(vault key, no salt, info label); addr = HMAC-SHA256(k_addr,
    # table NUL rid); ct = AES-256-GCM(k_aead, rid NUL json, aad "lethe-vault/2" NUL table NUL addr)
    key = Keystore(home).vault_key()
    k_aead = _rfc5869(key, b"", b"lethe vault v2: record sealing key (AES-256-GCM)", 32)
    k_addr = _rfc5869(key, b"", b"lethe vault v2: record address key (HMAC-SHA256)", 32)
    assert derive_keys(key) == (k_aead, k_addr)
    assert len({k_aead, k_addr, key}) == 3
    vault.put("stays", "1761350400", {"n": 3})
    db = _raw(home)
    tbl, addr, nonce, ct = db.execute("SELECT tbl, addr, nonce, ct FROM records").fetchone()
    db.close()
    assert tbl == "stays"
    assert addr == hmac.new(k_addr, b"stays\0" + b"1761350400", hashlib.sha256).digest()
    plain = AESGCM(k_aead).decrypt(nonce, ct, b"lethe-vault/2\0stays\0" + addr)
    assert plain == b'1761350400\0{"n":3}'


def test_schema_version_is_set(home, vault):
    db = _raw(home)
    assert db.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION == 2
    db.close()


# -- schema versions and migration from the first layout -------------------------------

def _build_first_layout(home, rows, key=None):
    """A vault.db as the first layout wrote it: rids in the clear, raw-key seals, AAD table NUL rid."""
    key = Keystore(home).ensure().vault_key() if key is None else key
    db = sqlite3.connect(str(home.vault_path))
    db.execute("PRAGMA journal_mode=WAL")
    db.execute("""CREATE TABLE records (seq INTEGER PRIMARY KEY AUTOINCREMENT, tbl TEXT NOT NULL,
                  rid TEXT NOT NULL, nonce BLOB NOT NULL, ct BLOB NOT NULL, UNIQUE (tbl, rid))""")
    aead = AESGCM(key)
    for table, rid, obj in rows:
        nonce = os.urandom(12)
        ct = aead.encrypt(nonce, json.dumps(obj, separators=(",", ":")).encode(), f"{table}\0{rid}".encode())
        db.execute("INSERT INTO records (tbl, rid, nonce, ct) VALUES (?, ?, ?, ?)", (table, rid, nonce, ct))
    db.commit()
    db.close()
    os.chmod(home.vault_path, 0o600)


OLD_ROWS = [("episodes", "2026-10-25T01:00+01:00", {"place": "P1"}),
            ("stays", "1761350400", {"n": 4}),
            ("gps_fixes", "item0042:17", {"lat": 38.7}),
            ("episodes", "2026-10-25T01:00+00:00", {"place": "P2"}),
            ("stays", "1761354000", {"n": 5})]


def test_first_layout_is_migrated_on_open(home):
    _build_first_layout(home, OLD_ROWS)
    assert b"1761350400" in home.vault_path.read_bytes()  # the first layout really shows the rid
    with Vault.open(home) as v:
        assert v.migrated == 5
        assert list(v.items("episodes")) == [("2026-10-25T01:00+01:00", {"place": "P1"}),
                                             ("2026-10-25T01:00+00:00", {"place": "P2"})]
        assert v.get("stays", "1761354000") == {"n": 5}
        assert v.tables() == {"episodes": 2, "gps_fixes": 1, "stays": 2}
        assert v.put("stays", "1761350400", {"n": 0}) is False  # idempotence survives the move
    db = _raw(home)
    assert db.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
    db.close()


def test_migration_keeps_insertion_order_for_later_writes(home):
    _build_first_layout(home, OLD_ROWS)
    with Vault.open(home) as v:
        v.put("stays", "1761357600", {"n": 6})
        v.upsert("stays", "1761350400", {"n": 40})
        assert list(v.items("stays")) == [("1761350400", {"n": 40}), ("1761354000", {"n": 5}),
                                          ("1761357600", {"n": 6})]


def test_migration_leaves_no_rid_on_disk(home):
    _build_first_layout(home, OLD_ROWS)
    assert b"2026-10-25" in home.vault_path.read_bytes()
    Vault.open(home).close()
    _assert_no_rid_bytes(_vault_bytes(home))


def test_second_open_after_migration_migrates_nothing(home):
    _build_first_layout(home, OLD_ROWS)
    Vault.open(home).close()
    with Vault.open(home) as v:
        assert v.migrated == 0 and v.count("stays") == 2


def test_empty_first_layout_is_migrated(home):
    _build_first_layout(home, [])
    with Vault.open(home) as v:
        assert v.migrated == 0 and v.tables() == {}
        v.put("t", "a", 1)
        assert v.get("t", "a") == 1


def test_altered_first_layout_record_stops_migration_unchanged(home):
    _build_first_layout(home, OLD_ROWS)
    db = sqlite3.connect(str(home.vault_path))
    db.execute("UPDATE records SET rid = '1761350999' WHERE rid = '1761350400'")
    db.commit()
    db.close()
    with pytest.raises(IntegrityError, match="first-layout record 'stays'/'1761350999' fails authentication"):
        Vault.open(home)
    db = _raw(home)
    assert db.execute("PRAGMA user_version").fetchone()[0] == 0
    assert db.execute("SELECT COUNT(*) FROM records WHERE rid IS NOT NULL").fetchone()[0] == 5
    db.close()


def test_first_layout_under_another_key_is_refused(home):
    _build_first_layout(home, OLD_ROWS, key=os.urandom(32))
    with pytest.raises(IntegrityError, match="altered or sealed with another key; nothing was changed"):
        Vault.open(home)


def test_future_schema_version_is_refused(home):
    Vault.open(home).close()
    db = _raw(home)
    db.execute("PRAGMA user_version = 3")
    db.commit()
    db.close()
    with pytest.raises(StateError, match="vault.db: vault schema version 3 is newer than this lethe reads"):
        Vault.open(home)
    db = _raw(home)
    assert db.execute("PRAGMA user_version").fetchone()[0] == 3  # left as it was
    db.close()


def test_future_version_is_refused_before_anything_is_written(home):
    db = _raw(home)
    db.execute("PRAGMA user_version = 7")
    db.commit()
    db.close()
    with pytest.raises(StateError, match="schema version 7"):
        Vault.open(home)
    db = _raw(home)
    assert db.execute("SELECT COUNT(*) FROM sqlite_master").fetchone()[0] == 0
    assert db.execute("PRAGMA journal_mode").fetchone()[0] == "delete"  # WAL was never switched on
    db.close()


def test_unknown_layout_is_refused(home):
    db = _raw(home)
    db.execute("CREATE TABLE something_else (x)")
    db.commit()
    db.close()
    with pytest.raises(IntegrityError, match=r"not a lethe vault layout \(schema version 0"):
        Vault.open(home)


def test_two_opens_racing_on_a_first_layout_migrate_once(home):
    _build_first_layout(home, OLD_ROWS)
    key = Keystore(home).vault_key()
    opened, errors = [], []

    def work():
        try:
            opened.append(Vault(home.vault_path, key))
        except Exception as e:  # noqa: BLE001  # pragma: no cover - any failure in the thread is reported below
            errors.append(e)

    threads = [threading.Thread(target=work) for _ in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors
    assert sorted(v.migrated for v in opened) == [0, 5]  # one did the work, the other found version 2
    assert opened[0].rids("stays") == opened[1].rids("stays") == ["1761350400", "1761354000"]
    for v in opened:
        v.close()
