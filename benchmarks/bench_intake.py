"""Intake end to end: backfill throughput, steady-state raw exposure, idle CPU, peak RSS, start-up.

Everything runs the real command (``agent.cli.main(["run", ...])``, as the ``lethe`` script does) in a child
process on fresh homes under a temporary directory:

* **start-up**: spawn ``lethe run`` on an empty inbox until it prints that it
  is watching; *cold* with an empty numba cache in the new home, *warm* the
  second time;
* **idle CPU**: the warm agent left watching an empty inbox for ``--idle-s``
  seconds (at least 60), CPU seconds from ``/proc/PID/stat``;
* **backfill**: ``lethe run --once`` over the 14-day demo inbox (the demo
  generator's files, written before the agent starts), then over its audio
  files alone and its accelerometry files alone for per-kind throughput;
* **steady state**: ``lethe run`` watching while files of the demo arrive one
  by one every 50-200 ms (written as ``.part`` and renamed, as recorders do);
* raw exposure (complete to destroyed) comes from the ledger
  (:func:`agent.ledger.verify_ledger`), peak RSS from each child's own
``VmHWM`` (``/proc/self/status``) as it exits.

References measured in the same run: exposure against the policy limit
(``retention.raw_seconds``); audio throughput against the naive path
``librosa.load(path, sr=16000)`` on the same files (decoding and resampling
only, no features, no safety, no vault); accelerometry against
``numpy.loadtxt`` of the same CSVs (parsing only).

Usage::

    python benchmarks/bench_intake.py [--days 14] [--steady-files 300] [--idle-s 60] [--json]

Targets on 2 cores (issue 3): p95 exposure < 2 s in steady state, >= 100 audio
snippets/s and >= 2 million accelerometry samples/s in backfill, idle CPU
< 0.05 s/min, peak RSS < 400 MB.  All data is the fictional demo participant's.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

TARGETS = {"steady_p95_s": 2.0, "audio_per_s": 100.0, "accel_samples_per_s": 2e6, "idle_cpu_s_per_min": 0.05,
           "peak_rss_mb": 400.0}


# -- set-up ----------------------------------------------------------------------------
def make_home(root: Path):
    from agent.home import Home

    h = Home(root).create()
    shutil.copy(ROOT / "policies" / "default.toml", h.policy_path)
    h.write_config({"timezone": "UTC"})
    return h


def demo_inbox(dst: Path, days: int, seed: int = 7) -> list[Path]:
    """The demo generator's files for ``days`` days ending yesterday, written into ``dst``."""
    from agent.demo.generator import Scenario, simulate_days, write_day
    from agent.policy import load_policy

    policy = load_policy(ROOT / "policies" / "default.toml")
    tl = simulate_days(Scenario.load(), time.time() - (days + 1) * 86400, days, seed=seed)
    files = []
    for d in range(days):
        files += write_day(tl, d, dst, policy, seed=seed)
    return files


def child_env(home) -> dict:
    env = {k: v for k, v in os.environ.items() if k != "NUMBA_CACHE_DIR"}  # the CLI points it into the home
    env.update(LETHE_NO_KEYRING="1", PYTHONPATH=str(ROOT))
    return env


# The real command, then its own peak RSS (VmHWM of the new address space).  rusage's
# ru_maxrss of a child is no use here: Linux carries the parent's high-water mark
# across fork and exec, so every child would report at least this process's size.
LETHE = r"""
import sys
from agent.cli import main
try:
    rc = main(sys.argv[1:])
finally:
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            print("peak_rss_kb", line.split()[1], file=sys.stderr, flush=True)
sys.exit(rc)
"""


def lethe_cmd(*args) -> list[str]:
    return [sys.executable, "-c", LETHE, *args]


def peak_kb(stderr_text: str) -> float:
    for line in stderr_text.splitlines():
        if line.startswith("peak_rss_kb"):
            return float(line.split()[1])
    return float("nan")


def popen_rusage(args, env, **kw):
    """Run to completion and return (stdout, stderr, returncode, rusage) using wait4."""
    p = subprocess.Popen(args, cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, **kw)
    out = p.stdout.read()
    err = p.stderr.read()
    _, status, ru = os.wait4(p.pid, 0)
    p.returncode = os.waitstatus_to_exitcode(status)
    return out, err, p.returncode, ru


def once_with_rusage(home) -> tuple[dict, float, float]:
    out, err, rc, ru = popen_rusage(lethe_cmd("--home", str(home.root), "run", "--once", "--json"), child_env(home))
    if rc != 0:
        raise SystemExit(f"lethe run --once failed ({rc}): {err.decode()[-2000:]}")
    return json.loads(out), peak_kb(err.decode()) / 1024.0, ru.ru_utime + ru.ru_stime


class Watching:
    """``lethe run`` in the background; waits for its "watching" line."""

    def __init__(self, home):
        self.home = home
        self.t_spawn = time.monotonic()
        self.p = subprocess.Popen(lethe_cmd("--home", str(home.root), "run"),
                                  cwd=ROOT, env=child_env(home), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                  text=True)
        line = self.p.stderr.readline()
        if "watching" not in line:
            self.p.kill()
            raise SystemExit(f"lethe run did not start: {line}{self.p.stderr.read()[-2000:]}")
        self.startup_s = time.monotonic() - self.t_spawn

    def cpu_s(self) -> float:
        fields = Path(f"/proc/{self.p.pid}/stat").read_text().rsplit(")", 1)[1].split()
        tick = os.sysconf("SC_CLK_TCK")
        return (int(fields[11]) + int(fields[12])) / tick   # utime + stime (proc(5))

    def stop(self):
        self.p.send_signal(signal.SIGTERM)
        out, err = self.p.communicate(timeout=120)
        return out, peak_kb(err) / 1024.0


def ledger_exposure(home) -> dict:
    from agent.ledger import verify_ledger

    rep = verify_ledger(home)
    e = rep.exposure
    return {"n": e["n"], "median_s": e["median"], "p95_s": e["p95"], "max_s": e["max"], "ok": rep.ok,
            "violations": len(rep.violations)}


def fill(inbox: Path, files) -> None:
    for f in files:
        shutil.copyfile(f, inbox / f.name)


def long_accel_files(dst: Path, n: int, hours: float = 6.0, rate_hz: float = 10.0, seed: int = 3) -> list[Path]:
    """Synthetic accelerometry recordings of ``hours`` each (gravity on z plus noise), fast to write."""
    import numpy as np

    rng = np.random.default_rng(seed)
    out = []
    t0 = time.time() - 10 * 86400
    m = int(hours * 3600 * rate_hz)
    for i in range(n):
        t = t0 + i * hours * 3600 + np.arange(m) / rate_hz
        xyz = 0.05 * rng.standard_normal((m, 3))
        xyz[:, 2] += 1.0
        p = dst / f"rec_{i:03d}.accel.csv"
        with open(p, "w") as f:
            f.write(f"# unit=g rate_hz={rate_hz:g}\ntime,x,y,z\n")
            np.savetxt(f, np.column_stack([t, xyz]), fmt=["%.3f", "%.4f", "%.4f", "%.4f"], delimiter=",")
        out.append(p)
    return out


# -- references --------------------------------------------------------------------------
def naive_audio(files) -> float:
    import librosa

    t0 = time.perf_counter()
    for f in files:
        librosa.load(f, sr=16000, mono=True)
    return len(files) / (time.perf_counter() - t0)


def naive_accel(files) -> float:
    import numpy as np

    n = 0
    t0 = time.perf_counter()
    for f in files:
        n += len(np.loadtxt(f, delimiter=",", skiprows=2))
    return n / (time.perf_counter() - t0)


# -- main ------------------------------------------------------------------------------------
def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--days", type=int, default=14)
    ap.add_argument("--steady-files", type=int, default=300)
    ap.add_argument("--idle-s", type=float, default=60.0)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--long-accel-files", type=int, default=16)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    if args.idle_s < 60:
        ap.error("--idle-s must be at least 60 seconds")
    res: dict = {"cores": os.cpu_count(), "days": args.days}
    work = Path(tempfile.mkdtemp(prefix="lethe-bench-intake-"))
    try:
        staged = work / "staged"
        t0 = time.perf_counter()
        files = demo_inbox(staged, args.days, args.seed)
        res["generate_s"] = round(time.perf_counter() - t0, 2)
        by_kind = {"audio": [f for f in files if f.suffix in (".wav", ".flac", ".ogg")],
                   "accel": [f for f in files if f.name.endswith(".accel.csv")]}
        res["files"] = len(files)
        log(f"demo inbox: {len(files)} files for {args.days} days ({res['generate_s']} s to generate)")

        # start-up, cold then warm, and idle CPU on the warm agent
        h = make_home(work / "idle")
        a = Watching(h)
        res["startup_cold_s"] = round(a.startup_s, 2)
        a.stop()
        a = Watching(h)
        res["startup_warm_s"] = round(a.startup_s, 2)
        time.sleep(1.0)
        c0, w0 = a.cpu_s(), time.monotonic()
        time.sleep(args.idle_s)
        c1, w1 = a.cpu_s(), time.monotonic()
        _, rss_idle = a.stop()
        res["idle_cpu_s_per_min"] = round((c1 - c0) / ((w1 - w0) / 60.0), 4)
        res["idle_rss_mb"] = round(rss_idle, 1)
        log(f"start-up: cold {res['startup_cold_s']} s, warm {res['startup_warm_s']} s; idle CPU "
            f"{res['idle_cpu_s_per_min']} s/min over {w1 - w0:.0f} s")

        # backfill: the whole demo inbox, then audio alone, then accelerometry alone
        h = make_home(work / "backfill")
        fill(h.inbox, files)
        rep, rss, cpu = once_with_rusage(h)
        res["backfill"] = {"files": rep["received"], "seconds": rep["seconds"],
                           "files_per_s": round(sum(rep["received"].values()) / rep["seconds"], 1),
                           "peak_rss_mb": round(rss, 1), "cpu_s": round(cpu, 2),
                           "rejected": rep["reasons"], "exposure": ledger_exposure(h)}
        log(f"backfill: {sum(rep['received'].values())} files in {rep['seconds']} s, peak RSS {rss:.0f} MB")
        for kind in ("audio", "accel"):
            h = make_home(work / f"backfill-{kind}")
            fill(h.inbox, by_kind[kind])
            rep, rss, cpu = once_with_rusage(h)
            n = rep["featurised"].get(kind, 0) + rep["duplicate"].get(kind, 0)
            res[f"backfill_{kind}"] = {"files": n, "seconds": rep["seconds"], "per_s": round(n / rep["seconds"], 1),
                                       "samples": rep["n_samples"].get(kind, 0),
                                       "samples_per_s": round(rep["n_samples"].get(kind, 0) / rep["seconds"]),
                                       "peak_rss_mb": round(rss, 1)}
        # Long accelerometry recordings (6 h at the policy's rate each): the per-sample rate
        # without the per-file cost of open, overwrite, fsync and unlink dominating.
        longdir = work / "long-accel"
        longdir.mkdir()
        long_files = long_accel_files(longdir, n=args.long_accel_files)
        h = make_home(work / "backfill-accel-long")
        fill(h.inbox, long_files)
        rep, rss, cpu = once_with_rusage(h)
        n = rep["n_samples"].get("accel", 0)
        res["backfill_accel_long"] = {"files": len(long_files), "seconds": rep["seconds"], "samples": n,
                                      "samples_per_s": round(n / rep["seconds"]), "peak_rss_mb": round(rss, 1)}
        sample = by_kind["audio"][:200]
        res["naive_audio_per_s"] = round(naive_audio(sample), 1)
        res["naive_accel_samples_per_s"] = round(naive_accel(by_kind["accel"][:200]))
        res["naive_accel_long_samples_per_s"] = round(naive_accel(long_files[:4]))
        log(f"audio {res['backfill_audio']['per_s']}/s (naive librosa.load {res['naive_audio_per_s']}/s); "
            f"accel {res['backfill_accel']['samples_per_s']:,} samples/s "
            f"(np.loadtxt {res['naive_accel_samples_per_s']:,}/s)")

        # steady state: files arrive one by one while the agent watches
        h = make_home(work / "steady")
        a = Watching(h)
        rng = random.Random(args.seed)
        arriving = sorted(files, key=lambda f: f.name)[: args.steady_files]
        rng.shuffle(arriving)
        t0 = time.monotonic()
        for f in arriving:
            tmp = h.inbox / f"{f.name}.part"
            shutil.copyfile(f, tmp)
            os.replace(tmp, h.inbox / f.name)
            time.sleep(rng.uniform(0.05, 0.2))
        deadline = time.monotonic() + 60
        while any(not n.endswith(".part") for n in os.listdir(h.inbox)) and time.monotonic() < deadline:
            time.sleep(0.05)
        feed_s = time.monotonic() - t0
        out, rss = a.stop()
        report = json.loads(out) if out.strip().startswith("{") else {}
        res["steady"] = {"files": len(arriving), "seconds": round(feed_s, 1), "peak_rss_mb": round(rss, 1),
                         "exposure": ledger_exposure(h), "left_in_inbox": len(os.listdir(h.inbox))}
        del report
        limit = h.load_policy().retention.raw_seconds
        ex = res["steady"]["exposure"]
        log(f"steady: {len(arriving)} files over {feed_s:.0f} s, exposure median {ex['median_s']:.3f} s, "
            f"p95 {ex['p95_s']:.3f} s, max {ex['max_s']:.3f} s (limit {limit:g} s)")

        peak = max(res["backfill"]["peak_rss_mb"], res["backfill_audio"]["peak_rss_mb"],
                   res["backfill_accel"]["peak_rss_mb"], res["steady"]["peak_rss_mb"], res["idle_rss_mb"])
        res["peak_rss_mb"] = peak
        res["ratios"] = {
            "steady_p95_vs_limit": round(ex["p95_s"] / limit, 4),
            "steady_max_vs_limit": round(ex["max_s"] / limit, 4),
            "audio_vs_naive_librosa_load": round(res["backfill_audio"]["per_s"] / res["naive_audio_per_s"], 2),
            "accel_vs_np_loadtxt": round(res["backfill_accel"]["samples_per_s"] / res["naive_accel_samples_per_s"], 2),
            "accel_long_vs_np_loadtxt": round(res["backfill_accel_long"]["samples_per_s"]
                                              / res["naive_accel_long_samples_per_s"], 2),
        }
        res["targets"] = {
            "steady_p95_s": [ex["p95_s"], TARGETS["steady_p95_s"], ex["p95_s"] < TARGETS["steady_p95_s"]],
            "audio_per_s": [res["backfill_audio"]["per_s"], TARGETS["audio_per_s"],
                            res["backfill_audio"]["per_s"] >= TARGETS["audio_per_s"]],
            "accel_samples_per_s": [res["backfill_accel"]["samples_per_s"], TARGETS["accel_samples_per_s"],
                                    res["backfill_accel"]["samples_per_s"] >= TARGETS["accel_samples_per_s"]],
            "accel_long_samples_per_s": [res["backfill_accel_long"]["samples_per_s"], TARGETS["accel_samples_per_s"],
                                         res["backfill_accel_long"]["samples_per_s"] >= TARGETS["accel_samples_per_s"]],
            "idle_cpu_s_per_min": [res["idle_cpu_s_per_min"], TARGETS["idle_cpu_s_per_min"],
                                   res["idle_cpu_s_per_min"] < TARGETS["idle_cpu_s_per_min"]],
            "peak_rss_mb": [peak, TARGETS["peak_rss_mb"], peak < TARGETS["peak_rss_mb"]],
        }
    finally:
        shutil.rmtree(work, ignore_errors=True)
    out_dir = ROOT / "benchmarks" / "out"
    out_dir.mkdir(exist_ok=True)
    (out_dir / "intake.json").write_text(json.dumps(res, indent=2, sort_keys=True))
    if args.json:
        print(json.dumps(res, indent=2, sort_keys=True))
    else:
        print_table(res)
    return 0


def log(msg: str) -> None:
    print(f"[bench_intake] {msg}", file=sys.stderr, flush=True)


def print_table(r: dict) -> None:
    print(f"intake benchmark: {r['files']} demo files, {r['days']} days, {r['cores']} cores")
    print(f"  start-up (lethe run until watching): cold {r['startup_cold_s']} s, warm {r['startup_warm_s']} s")
    b = r["backfill"]
    print(f"  backfill: {sum(b['files'].values())} files in {b['seconds']} s ({b['files_per_s']} files/s), "
          f"exposure median {b['exposure']['median_s']:.2f} s, max {b['exposure']['max_s']:.2f} s")
    print(f"  audio backfill: {r['backfill_audio']['per_s']} snippets/s "
          f"(naive librosa.load: {r['naive_audio_per_s']}/s, ratio {r['ratios']['audio_vs_naive_librosa_load']})")
    print(f"  accel backfill (demo bursts): {r['backfill_accel']['samples_per_s']:,} samples/s "
          f"(np.loadtxt: {r['naive_accel_samples_per_s']:,}/s, ratio {r['ratios']['accel_vs_np_loadtxt']})")
    print(f"  accel backfill (6 h recordings): {r['backfill_accel_long']['samples_per_s']:,} samples/s "
          f"(np.loadtxt: {r['naive_accel_long_samples_per_s']:,}/s, ratio {r['ratios']['accel_long_vs_np_loadtxt']})")
    s = r["steady"]["exposure"]
    print(f"  steady state: median {s['median_s']:.3f} s, p95 {s['p95_s']:.3f} s, max {s['max_s']:.3f} s "
          f"(p95/limit {r['ratios']['steady_p95_vs_limit']})")
    print(f"  idle CPU: {r['idle_cpu_s_per_min']} s/min; peak RSS {r['peak_rss_mb']} MB")
    for k, (got, target, ok) in r["targets"].items():
        print(f"  target {k}: {got} vs {target}: {'met' if ok else 'MISSED'}")


if __name__ == "__main__":
    sys.exit(main())
