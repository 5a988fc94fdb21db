"""Throughput of featurise() alone: audio snippets/s and accelerometry samples/s.

Each figure is printed beside a reference measured in the same run on the same
inputs (after one untimed warm-up call of each), so the ratio is meaningful on
any machine:

* audio: ``librosa.load(path, sr=16000)`` from a file plus the same features
  through librosa's own functions (each computes its own STFT);
* accelerometry: ``np.loadtxt`` of the same CSV (parsing only, no checks or
  features), and the plain-decimal reader alone on the same body.

Usage::

    python benchmarks/bench_features.py [--n-audio 200] [--json]

Goals (issue 15, for the whole pipeline on 2 cores; featurise() alone on one
core is the ceiling a single worker can reach): >= 500 audio snippets/s with
two worker processes, so >= 250/s from featurise() alone on one core, and
>= 5 million accelerometry samples/s on 600-row and on 6-hour files.  Each
rate is printed as the best and median wall-clock run and as the best rate by
CPU time.  No personal data: every input is synthetic.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

T0 = 1793793600.0  # 2026-11-04T12:00:00Z
GOAL_AUDIO_PER_S = 500.0          # issue 15, intake with two worker processes
GOAL_AUDIO_PER_CORE_S = GOAL_AUDIO_PER_S / 2   # what featurise() alone must reach on one core
GOAL_ACCEL_SAMPLES_PER_S = 5e6    # issue 15


def _stamp(t):
    return time.strftime("%Y%m%dT%H%M%SZ", time.gmtime(t))


def audio_inputs(n, sr, channels, seconds=3.0, seed=0):
    import soundfile as sf

    rng = np.random.default_rng(seed)
    out = []
    tt = np.arange(int(seconds * sr)) / sr
    for i in range(n):
        f = rng.uniform(100, 3000)
        y = 0.2 * np.sin(2 * np.pi * f * tt) + 0.05 * rng.standard_normal(tt.size)
        y = np.column_stack([y] * channels) if channels > 1 else y
        buf = io.BytesIO()
        sf.write(buf, y.astype(np.float32), sr, format="WAV", subtype="PCM_16")
        out.append((f"snd_{_stamp(T0 + 600 * i)}.wav", buf.getvalue()))
    return out


def accel_input(n, rate=10.0, seed=0):
    rng = np.random.default_rng(seed)
    t = T0 + np.arange(n) / rate
    xyz = rng.normal(0.0, 0.05, (n, 3))
    xyz[:, 2] += 1.0
    body = "\n".join(f"{a:.3f},{x:.4f},{y:.4f},{z:.4f}" for a, (x, y, z) in zip(t, xyz, strict=True))
    return f"# unit=g rate_hz={rate:g}\ntime,x,y,z\n{body}\n".encode()


def librosa_reference(path, sr):
    import librosa

    y, _ = librosa.load(path, sr=sr, mono=True)
    kw = dict(n_fft=512, hop_length=256)
    m = librosa.feature.mfcc(y=y, sr=sr, n_mfcc=20, n_mels=40, **kw)
    librosa.feature.melspectrogram(y=y, sr=sr, n_mels=40, **kw)
    librosa.feature.spectral_centroid(y=y, sr=sr, **kw)
    librosa.feature.spectral_flatness(y=y, **kw)
    librosa.feature.spectral_rolloff(y=y, sr=sr, **kw)
    librosa.feature.zero_crossing_rate(y, frame_length=512, hop_length=256)
    return m.mean(axis=1)


def best_rate(fn, units, repeat=5):
    """Units per second: best and median of ``repeat`` timed runs, and best by CPU time.

    The best run is the least disturbed by other load on a shared machine; the
    median shows how much that load mattered.  The CPU-time rate (this
    process's user + system time) is what one core would give if nothing else
    ran on it; on a loaded machine it is the steadier figure.
    """
    rates, cpu_rates = [], []
    for _ in range(repeat):
        c = time.process_time()
        t = time.perf_counter()
        fn()
        rates.append(units / (time.perf_counter() - t))
        cpu_rates.append(units / max(time.process_time() - c, 1e-9))
    return max(rates), float(np.median(rates)), max(cpu_rates)


def _pair(name, ours, ref):
    return {name: ours[0], name + "_median": ours[1], name + "_cpu": ours[2], "reference_per_s": ref[0],
            "reference_median": ref[1], "reference_cpu": ref[2], "ratio": ours[0] / ref[0]}


def bench_audio(policy, n, sr_in, channels):
    import librosa  # noqa: F401  (import outside the timed region)

    from agent.intake import featurise

    items = audio_inputs(n, sr_in, channels)
    featurise(items[0][0], items[0][1], policy, now=T0 + 1e7)  # warm: caches, lazy imports
    ours = best_rate(lambda: [featurise(nm, d, policy, now=T0 + 1e7) for nm, d in items], n)
    with tempfile.TemporaryDirectory() as tmp:
        paths = []
        for nm, d in items:
            p = os.path.join(tmp, nm)
            with open(p, "wb") as fh:
                fh.write(d)
            paths.append(p)
        librosa_reference(paths[0], policy.intake.audio_sr)
        ref = best_rate(lambda: [librosa_reference(p, policy.intake.audio_sr) for p in paths], n)
    return {"input": f"{sr_in} Hz x{channels}", **_pair("snippets_per_s", ours, ref)}


def bench_resamplers(sr_in=44100, sr_out=16000, n=50):
    import librosa

    y = np.random.default_rng(0).standard_normal(int(3 * sr_in)).astype(np.float32)
    out = {}
    for rt in ("soxr_hq", "soxr_vhq", "polyphase", "kaiser_fast"):
        try:
            librosa.resample(y, orig_sr=sr_in, target_sr=sr_out, res_type=rt)
        except (ImportError, ValueError, ModuleNotFoundError) as e:  # a resampler whose backend is not installed
            out[rt] = f"unavailable ({type(e).__name__})"
            continue
        out[rt] = best_rate(lambda rt=rt: [librosa.resample(y, orig_sr=sr_in, target_sr=sr_out, res_type=rt)
                                           for _ in range(n)], n)[0]
    return out


def bench_accel(policy, n_rows, repeat_files):
    from agent.intake import featurise
    from agent.intake.readers.plaincsv import parse_plain

    data = accel_input(n_rows)
    name = f"burst_{_stamp(T0)}.accel.csv"
    now = T0 + 10 * 86400 + n_rows / 10.0
    featurise(name, data, policy, now=now)
    ours = best_rate(lambda: [featurise(name, data, policy, now=now) for _ in range(repeat_files)],
                     n_rows * repeat_files)
    body = data.split(b"\n", 2)[2]
    np.loadtxt(io.BytesIO(body), delimiter=",")
    ref = best_rate(lambda: [np.loadtxt(io.BytesIO(body), delimiter=",") for _ in range(repeat_files)],
                    n_rows * repeat_files)
    parse_plain(body, 4)
    plain = best_rate(lambda: [parse_plain(body, 4) for _ in range(repeat_files)], n_rows * repeat_files)
    return {"rows_per_file": n_rows, **_pair("samples_per_s", ours, ref),
            "plain_reader_per_s": plain[0], "plain_reader_median": plain[1], "plain_reader_cpu": plain[2],
            "plain_vs_loadtxt": plain[0] / ref[0]}


def accel_wav_input(n, rate=10, seed=0):
    """The same kind of samples as :func:`accel_input`, as a binary burst (32-bit float WAV)."""
    import soundfile as sf

    rng = np.random.default_rng(seed)
    xyz = rng.normal(0.0, 0.05, (n, 3))
    xyz[:, 2] += 1.0
    buf = io.BytesIO()
    sf.write(buf, xyz.astype(np.float32), rate, format="WAV", subtype="FLOAT")
    return buf.getvalue()


def bench_accel_wav(policy, n_rows, repeat_files):
    from agent.intake import featurise

    data = accel_wav_input(n_rows)
    name = f"burst_{_stamp(T0)}.accel.wav"
    now = T0 + 10 * 86400 + n_rows / 10.0
    featurise(name, data, policy, now=now)
    ours = best_rate(lambda: [featurise(name, data, policy, now=now) for _ in range(repeat_files)],
                     n_rows * repeat_files)
    return {"rows_per_file": n_rows, "samples_per_s": ours[0], "samples_per_s_median": ours[1],
            "samples_per_s_cpu": ours[2]}


def bench_billion_laughs(policy, n=200):
    """Seconds to reject an entity-expansion bomb (it must not be expanded)."""
    from agent.errors import RejectedInput
    from agent.intake import featurise

    lol = "".join(f'<!ENTITY l{i} "{f"&l{i - 1};" * 10 if i else "lol"}">' for i in range(10))
    doc = (f'<?xml version="1.0"?><!DOCTYPE gpx [{lol}]><gpx version="1.1"><name>&l9;</name></gpx>').encode()
    t = time.perf_counter()
    for _ in range(n):
        with contextlib.suppress(RejectedInput):
            featurise("bomb.gpx", doc, policy)
    return (time.perf_counter() - t) / n


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--n-audio", type=int, default=200)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)

    from agent.intake import warm_up
    from agent.policy import bundled_policy_path, load_policy

    policy = load_policy(bundled_policy_path())
    warm_s = warm_up(policy)

    res = {
        "date_utc": time.strftime("%Y-%m-%d %H:%M", time.gmtime()),
        "cpu_count": os.cpu_count(),
        "load_average_1min": os.getloadavg()[0],
        "warm_up_s": warm_s,
        "audio": [bench_audio(policy, args.n_audio, 16000, 1),
                  bench_audio(policy, args.n_audio, 44100, 2)],
        "resample_44k1_to_16k_per_s": bench_resamplers(),
        "accel": [bench_accel(policy, 600, 100), bench_accel(policy, 216_000, 1)],   # 60 s and 6 h at 10 Hz
        "accel_wav": [bench_accel_wav(policy, 600, 100), bench_accel_wav(policy, 216_000, 1)],
        "billion_laughs_reject_s": bench_billion_laughs(policy),
    }
    res["load_average_1min_at_end"] = os.getloadavg()[0]
    res["goals"] = {
        "audio_snippets_per_s_per_core": [min(a["snippets_per_s"] for a in res["audio"]), GOAL_AUDIO_PER_CORE_S],
        "accel_600_rows_samples_per_s": [res["accel"][0]["samples_per_s"], GOAL_ACCEL_SAMPLES_PER_S],
        "accel_6_hours_samples_per_s": [res["accel"][1]["samples_per_s"], GOAL_ACCEL_SAMPLES_PER_S],
        "accel_wav_600_rows_samples_per_s": [res["accel_wav"][0]["samples_per_s"], GOAL_ACCEL_SAMPLES_PER_S],
        "accel_wav_6_hours_samples_per_s": [res["accel_wav"][1]["samples_per_s"], GOAL_ACCEL_SAMPLES_PER_S],
    }
    if args.json:
        print(json.dumps(res, indent=2))
        return 0
    print(f"{res['date_utc']} UTC, {res['cpu_count']} CPUs, load average {res['load_average_1min']:.1f} at start, "
          f"{res['load_average_1min_at_end']:.1f} at end; figures are best (median) of 5 runs")
    print(f"warm_up(): {warm_s:.2f} s")
    for a in res["audio"]:
        print(f"audio {a['input']:>14}: featurise {a['snippets_per_s']:7.1f} ({a['snippets_per_s_median']:.1f}) "
              f"snippets/s, by CPU {a['snippets_per_s_cpu']:.1f}/s | librosa.load + librosa features "
              f"{a['reference_per_s']:7.1f} ({a['reference_median']:.1f})/s | ratio {a['ratio']:.2f}")
    for rt, v in res["resample_44k1_to_16k_per_s"].items():
        print(f"resample 3 s 44.1->16 kHz {rt:>11}: " + (f"{v:8.1f}/s" if isinstance(v, float) else v))
    for a in res["accel"]:
        print(f"accel {a['rows_per_file']:>7} rows/file: featurise {a['samples_per_s'] / 1e6:5.2f} "
              f"({a['samples_per_s_median'] / 1e6:.2f}) M samples/s, by CPU {a['samples_per_s_cpu'] / 1e6:.2f} "
              f"({a['rows_per_file'] / a['samples_per_s_cpu'] * 1e6:.0f} us CPU per file) | np.loadtxt alone "
              f"{a['reference_per_s'] / 1e6:5.2f} ({a['reference_median'] / 1e6:.2f}) M/s, by CPU "
              f"{a['reference_cpu'] / 1e6:.2f} | ratio {a['ratio']:.2f} "
              f"| plain reader alone {a['plain_reader_per_s'] / 1e6:5.2f} M/s, "
              f"by CPU {a['plain_reader_cpu'] / 1e6:.2f} "
              f"({a['plain_vs_loadtxt']:.2f}x loadtxt)")
    for a in res["accel_wav"]:
        print(f"accel {a['rows_per_file']:>7} samples as .accel.wav: featurise {a['samples_per_s'] / 1e6:5.2f} "
              f"({a['samples_per_s_median'] / 1e6:.2f}) M samples/s, by CPU {a['samples_per_s_cpu'] / 1e6:.2f} "
              f"({a['rows_per_file'] / a['samples_per_s_cpu'] * 1e6:.0f} us CPU per file)")
    print(f"billion-laughs GPX rejected in {res['billion_laughs_reject_s'] * 1e6:.0f} us")
    for name, (got, goal) in res["goals"].items():
        verdict = "reached" if got >= goal else f"NOT reached (missed by {1 - got / goal:.0%})"
        print(f"goal (issue 15) {name}: featurise() alone on one core, best wall-clock run {got:,.0f} "
              f"vs >= {goal:,.0f}: {verdict}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
