"""Storage-layer timings: ledger append and verification, vault writes and reads,
passphrase unlock.  Run: ``/work/venv/bin/python benchmarks/bench_storage.py``.

Figures go to docs/ledger.md and docs/vault.md.  Nothing here is asserted.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from agent.home import Home  # noqa: E402
from agent.keystore import Keystore  # noqa: E402
from agent.ledger import Ledger, verify_ledger  # noqa: E402
from agent.vault import Vault  # noqa: E402


def _fill_ledger(lg: Ledger, n_items: int, batch_items: int = 300) -> None:
    """received + featurised + destroyed per item, written in large batches."""
    now = time.time()
    k = 0
    while k < n_items:
        rows = []
        for i in range(k, min(k + batch_items, n_items)):
            it = f"{i:032x}"
            rows += [("received", {"item": it, "kind": "audio", "bytes": 96044, "complete_at": now}),
                     ("featurised", {"item": it, "kind": "audio", "rows": 1}),
                     ("destroyed", {"item": it, "kind": "audio", "complete_at": now, "exposure_s": 0.4})]
        lg.append_many(rows)
        k += batch_items


def bench_ledger(root: Path, sizes) -> dict:
    out = {}
    home = Home(root / "ledger-append").create()
    lg = Ledger(home, Keystore(home).ensure().device_key())
    n = 300
    t = time.perf_counter()
    for i in range(n):
        lg.append("resumed")
    out["append_single_ms"] = (time.perf_counter() - t) / n * 1000
    t = time.perf_counter()
    for i in range(n // 3):
        it = f"{i:032x}"
        lg.append_many([("received", {"item": it, "kind": "audio", "bytes": 1, "complete_at": 1.0}),
                        ("featurised", {"item": it, "kind": "audio", "rows": 1}),
                        ("destroyed", {"item": it, "kind": "audio", "complete_at": 1.0, "exposure_s": 0.1})])
    out["append_many_3_ms"] = (time.perf_counter() - t) / (n // 3) * 1000
    for n_entries in sizes:
        home = Home(root / f"ledger-{n_entries}").create()
        lg = Ledger(home, Keystore(home).ensure().device_key())
        _fill_ledger(lg, n_entries // 3)
        size = home.ledger_path.stat().st_size
        t = time.perf_counter()
        r = verify_ledger(home, policy=30, now=time.time())
        dt = time.perf_counter() - t
        assert r.ok, r.problems[:3]
        out[f"verify_{r.entries}"] = {"seconds": dt, "entries_per_s": r.entries / dt, "file_mb": size / 1e6}
    return out


def bench_vault(root: Path) -> dict:
    home = Home(root / "vault").create()
    out = {}
    with Vault.open(home) as v:
        payload = {"t": 1.0, "vec": [0.123456789] * 64, "dbfs": -23.5, "dba": 51.2}
        n = 20000
        rows = [(f"{i:032x}", payload) for i in range(n)]
        t = time.perf_counter()
        for k in range(0, n, 500):
            v.put_many("audio_features", rows[k:k + 500])
        out["put_many_rows_per_s"] = n / (time.perf_counter() - t)
        m = 300
        t = time.perf_counter()
        for i in range(m):
            v.put("single", str(i), payload)
        out["put_single_ms"] = (time.perf_counter() - t) / m * 1000
        t = time.perf_counter()
        count = sum(1 for _ in v.items("audio_features"))
        out["items_rows_per_s"] = count / (time.perf_counter() - t)
        t = time.perf_counter()
        for i in range(0, n, 20):
            v.get("audio_features", f"{i:032x}")
        out["get_ms"] = (time.perf_counter() - t) / (n // 20) * 1000
    out["db_mb"] = sum(p.stat().st_size for p in home.root.iterdir() if p.name.startswith("vault.db")) / 1e6
    return out


def bench_unlock(root: Path) -> dict:
    home = Home(root / "unlock").create()
    Keystore(home, b"benchmark passphrase").ensure()
    t = time.perf_counter()
    ks = Keystore(home, b"benchmark passphrase")
    ks.vault_key()
    ks.content_key()
    ks.device_key()
    return {"unlock_s": time.perf_counter() - t}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="20000,100000", help="ledger sizes (entries) to verify")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    sizes = [int(s) for s in args.sizes.split(",") if s]
    with tempfile.TemporaryDirectory(prefix="lethe-bench-") as d:
        root = Path(d)
        res = {"cpu_count": os.cpu_count(), "ledger": bench_ledger(root, sizes), "vault": bench_vault(root),
               "keystore": bench_unlock(root)}
    if args.json:
        print(json.dumps(res, indent=2))
    else:
        for section, vals in res.items():
            print(section, json.dumps(vals, indent=1) if isinstance(vals, dict) else vals)
    return 0


if __name__ == "__main__":
    sys.exit(main())
