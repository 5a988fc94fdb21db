"""Vault: cost of opening a first-layout vault.db (clear rids) and migrating it.

Run: ``/work/venv/bin/python benchmarks/bench_vault_migration.py [--rows 20000,100000] [--json]``.
Figures go to docs/vault.md.  Nothing here is asserted.
"""

from __future__ import annotations

import argparse
import json
import os
import sqlite3
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from cryptography.hazmat.primitives.ciphers.aead import AESGCM  # noqa: E402

from agent.home import Home  # noqa: E402
from agent.keystore import Keystore  # noqa: E402
from agent.vault import Vault  # noqa: E402

_FIRST_LAYOUT = """CREATE TABLE records (seq INTEGER PRIMARY KEY AUTOINCREMENT, tbl TEXT NOT NULL,
                   rid TEXT NOT NULL, nonce BLOB NOT NULL, ct BLOB NOT NULL, UNIQUE (tbl, rid))"""


def build_first_layout(home: Home, n_rows: int) -> None:
    """n_rows audio-feature-sized records sealed the way the first layout did."""
    key = Keystore(home, storage="plain").ensure().vault_key()
    aead = AESGCM(key)
    payload = json.dumps({"t": 1.0, "vec": [0.123456789] * 64, "dbfs": -23.5, "dba": 51.2},
                         separators=(",", ":")).encode()
    db = sqlite3.connect(str(home.vault_path))
    db.execute("PRAGMA journal_mode=WAL")
    db.execute(_FIRST_LAYOUT)
    rows = []
    for i in range(n_rows):
        rid, nonce = f"{i:032x}", os.urandom(12)
        rows.append(("audio_features", rid, nonce, aead.encrypt(nonce, payload, f"audio_features\0{rid}".encode())))
    db.executemany("INSERT INTO records (tbl, rid, nonce, ct) VALUES (?, ?, ?, ?)", rows)
    db.commit()
    db.close()


def bench(root: Path, n_rows: int) -> dict:
    home = Home(root / f"h{n_rows}").create()
    build_first_layout(home, n_rows)
    size = home.vault_path.stat().st_size
    t = time.perf_counter()
    v = Vault.open(home)
    migrate_s = time.perf_counter() - t
    migrated = v.migrated
    v.close()
    t = time.perf_counter()
    Vault.open(home).close()
    return {"rows": migrated, "first_layout_mb": size / 1e6, "open_and_migrate_s": migrate_s,
            "rows_per_s": migrated / migrate_s, "later_open_s": time.perf_counter() - t,
            "after_mb": home.vault_path.stat().st_size / 1e6}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", default="20000,100000", help="record counts to migrate")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="lethe-bench-") as d:
        res = [bench(Path(d), int(n)) for n in args.rows.split(",") if n]
    if args.json:
        print(json.dumps(res, indent=2))
    else:
        for r in res:
            print("  ".join(f"{k}={v:.3g}" if isinstance(v, float) else f"{k}={v}" for k, v in r.items()))
    return 0


if __name__ == "__main__":
    sys.exit(main())
