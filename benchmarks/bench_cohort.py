"""Cohort-scale timings: opening 10,000 bundles, streaming merge, and study planning on Dask.

Run: ``/work/venv/bin/python benchmarks/bench_cohort.py [--bundles 10000] [--fits 1000]``.

* ``study open`` of N bundles in batches of 1,000 (one call each): the time
  per batch stays flat when opening is linear (the registry is saved once per
  call, not once per bundle);
* ``study merge`` of all of them: wall time and the peak of Python allocations
  (tracemalloc), which stays at a few bundles' worth when merging streams;
* study planning: ``--fits`` synthetic participants simulated and fitted on a
  2-worker LocalCluster against the same work in this one process.

Figures go to docs/benchmarks.md.  Nothing here is asserted.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
import tracemalloc
from dataclasses import asdict
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))


def make_study(tmp: Path, n_devices: int):
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

    from _bundle_fixtures import Study
    from agent.study.card import make_enrolment
    from agent.study.registry import Registry, locked

    s = Study(tmp)
    devices = [s.device]
    with locked(s.dir):
        reg = Registry.load(s.dir)
        from agent.study.card import verify_enrolment

        for i in range(n_devices - 1):
            key = Ed25519PrivateKey.generate()
            reg.add(verify_enrolment(make_enrolment(s.card, s.policy, f"pBench{i:05d}", key)))
            devices.append(key)
        reg.save()
    return s, devices


def bench_open(n_bundles: int, n_devices: int) -> dict:
    from _bundle_fixtures import PASS, make_payload
    from agent.study.open import open_bundles

    tmp = Path(tempfile.mkdtemp(prefix="lethe-bench-cohort-"))
    s, devices = make_study(tmp, n_devices)
    payload = make_payload(s.policy)
    t0 = time.perf_counter()
    folder = tmp / "incoming"
    folder.mkdir()
    per_dev = n_bundles // n_devices
    for d, key in enumerate(devices):
        for seq in range(1, per_dev + 1):
            (folder / f"{d:05d}-{seq:06d}.lethe").write_bytes(s.seal(payload, seq=seq, device=key))
    seal_s = time.perf_counter() - t0
    files = sorted(folder.iterdir())
    batches = []
    t_all = time.perf_counter()
    for i in range(0, len(files), 1000):
        t = time.perf_counter()
        res = open_bundles(s.dir, files[i:i + 1000], PASS, strict=False)
        batches.append(time.perf_counter() - t)
        bad = [r for r in res if not r.ok]
        if bad:
            raise SystemExit(f"benchmark setup: {bad[0].error}")
    open_s = time.perf_counter() - t_all
    from agent.study.cohort.merge import merge

    tracemalloc.start()
    t = time.perf_counter()
    out = merge(s.dir, tmp / "tables")
    merge_s = time.perf_counter() - t
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    rows = {}
    for k, v in out.items():
        with open(v) as f:
            rows[k] = sum(1 for _ in f) - 1
    return {"bundles": len(files), "devices": n_devices, "seal_s": round(seal_s, 1),
            "open_s": round(open_s, 1), "open_batches_s": [round(b, 2) for b in batches],
            "merge_s": round(merge_s, 1), "merge_peak_mib": round(peak / 2**20, 1),
            "merge_rows": rows, "workdir": str(tmp)}


def bench_plan(n_fits: int, trials: int = 120) -> dict:
    import logging

    from distributed import Client, LocalCluster

    from agent.study.cohort.plan import PlanModel, simulate_fits

    model = asdict(PlanModel())
    per_task = 100
    args = [(1000 + j, min(per_task, n_fits - j * per_task), trials, model) for j in range((n_fits + per_task - 1)
                                                                                        // per_task)]
    t = time.perf_counter()
    local = [simulate_fits(*a) for a in args]
    one_s = time.perf_counter() - t
    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                           silence_logs=logging.ERROR)
    c = Client(cluster)
    try:
        # Workers up and warm: numpy, scipy and the simulator imported on each before timing.
        c.run(lambda: simulate_fits(0, 1, 10, model) is not None)
        t = time.perf_counter()
        futs = [c.submit(simulate_fits, *a, pure=False) for a in args]
        dist = c.gather(futs)
        two_s = time.perf_counter() - t
    finally:
        c.close()
        cluster.close()
    import numpy as np

    same = all(np.array_equal(a, b) for a, b in zip(local, dist, strict=True))
    return {"participants_fitted": n_fits, "trials_each": trials, "one_process_s": round(one_s, 2),
            "local_cluster_2_workers_s": round(two_s, 2),
            "speedup": round(one_s / two_s, 2), "identical_results": same, "cpus": os.cpu_count(),
            "load_average_1min_after": round(os.getloadavg()[0], 1)}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--bundles", type=int, default=10000)
    ap.add_argument("--devices", type=int, default=100)
    ap.add_argument("--fits", type=int, default=1000)
    ap.add_argument("--skip-open", action="store_true")
    a = ap.parse_args()
    out = {"load_average_1min_before": round(os.getloadavg()[0], 1)}
    print(json.dumps(out), flush=True)
    if not a.skip_open:
        out["open"] = bench_open(a.bundles, a.devices)
        print(json.dumps(out["open"], indent=1), flush=True)
    out["plan"] = bench_plan(a.fits)
    print(json.dumps(out["plan"], indent=1), flush=True)


if __name__ == "__main__":
    main()
