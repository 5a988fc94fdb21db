"""Storage-layer timings: ledger append and verification, vault writes and reads,
passphrase unlock.  Run: ``/work/venv/bin/python benchmarks/bench_storage.py``.

Issue 15 figures: the ledger's part of start-up (``Ledger.open_items`` and the
first append) and of ``lethe status`` (``intake_counts``) at 13k and 100k
entries, from the signed checkpoint, against reading the whole ledger (the
checkpoint removed) in the same run; ``audit verify`` of 100k entries on all
cores against one process and against Ed25519 verification alone.

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
# Throw-away benchmark homes keep plain key files, by this explicit choice (docs/vault.md).
os.environ.setdefault("LETHE_KEY_STORAGE", "plain")

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
    lg = Ledger(home, Keystore(home, storage="plain").ensure().device_key())
    n = 300
    t = time.perf_counter()
    for _ in range(n):
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
        lg = Ledger(home, Keystore(home, storage="plain").ensure().device_key())
        _fill_ledger(lg, n_entries // 3)
        size = home.ledger_path.stat().st_size
        t = time.perf_counter()
        r = verify_ledger(home, retention_limit_s=30, now=time.time())
        dt = time.perf_counter() - t
        assert r.ok, r.problems[:3]
        out[f"verify_{r.entries}"] = {"seconds": dt, "entries_per_s": r.entries / dt, "file_mb": size / 1e6}
    return out


def _ed25519_alone(home: Home) -> float:
    """Seconds to verify every entry's signature in one process, nothing else (the reference)."""
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

    pub = Keystore(home).device_public()
    assert isinstance(pub, Ed25519PublicKey)
    pairs = []
    with open(home.ledger_path, "rb") as f:
        for line in f:
            e = json.loads(line)
            pairs.append((bytes.fromhex(e["sig"]), bytes.fromhex(e["hash"])))
    t = time.perf_counter()
    for sig, msg in pairs:
        pub.verify(sig, msg)
    return time.perf_counter() - t


def bench_startup_and_verify(root: Path, sizes) -> dict:
    """Issue 15: start-up and status independent of ledger length; verification on all cores."""
    import shutil

    from agent.intake.report import intake_counts
    from agent.ledger.log import CHECKPOINT_NAME

    out = {}
    for n_entries in sizes:
        home = Home(root / f"startup-{n_entries}").create()
        key = Keystore(home, storage="plain").ensure().device_key()
        _fill_ledger(Ledger(home, key), n_entries // 3)
        res = {"entries": n_entries}

        def startup(home=home, key=key):
            t = time.perf_counter()
            lg = Ledger(home, key)
            lg.open_items()
            lg.append("agent_start")
            return time.perf_counter() - t

        def status(home=home):
            t = time.perf_counter()
            intake_counts(home)
            return time.perf_counter() - t

        res["startup_from_checkpoint_s"] = min(startup() for _ in range(3))
        res["status_ledger_part_s"] = min(status() for _ in range(3))
        cp = home.root / CHECKPOINT_NAME
        saved = root / "cp.saved"
        shutil.copy(cp, saved)
        cp.unlink()
        res["startup_full_read_s"] = startup()  # the reference: the whole ledger read (as before)
        cp.unlink(missing_ok=True)
        res["status_full_read_s"] = status()
        shutil.copy(saved, cp)
        if n_entries == max(sizes):
            t = time.perf_counter()
            r = verify_ledger(home, retention_limit_s=30, now=time.time())
            res["verify_all_cores_s"] = time.perf_counter() - t
            assert r.ok, r.problems[:3]
            t = time.perf_counter()
            verify_ledger(home, retention_limit_s=30, now=time.time(), workers=1)
            res["verify_one_process_s"] = time.perf_counter() - t
            res["ed25519_alone_one_core_s"] = _ed25519_alone(home)
            res["verify_vs_ed25519_alone"] = res["verify_all_cores_s"] / res["ed25519_alone_one_core_s"]
        out[str(n_entries)] = res
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
    ap.add_argument("--startup-sizes", default="13000,100000",
                    help="ledger sizes (entries) for the start-up, status and all-core verification figures")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    sizes = [int(s) for s in args.sizes.split(",") if s]
    with tempfile.TemporaryDirectory(prefix="lethe-bench-") as d:
        root = Path(d)
        startup_sizes = [int(s) for s in args.startup_sizes.split(",") if s]
        res = {"cpu_count": os.cpu_count(), "load_avg_1min": os.getloadavg()[0],
               "ledger": bench_ledger(root, sizes), "startup_and_verify": bench_startup_and_verify(root, startup_sizes),
               "vault": bench_vault(root), "keystore": bench_unlock(root)}
    if args.json:
        print(json.dumps(res, indent=2))
    else:
        for section, vals in res.items():
            print(section, json.dumps(vals, indent=1) if isinstance(vals, dict) else vals)
    return 0


if __name__ == "__main__":
    sys.exit(main())
