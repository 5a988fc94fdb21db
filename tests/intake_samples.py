"""Small valid and invalid raw files for the intake pipeline tests (all synthetic)."""

from __future__ import annotations

import io
import os
import shutil
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parent.parent
T0 = 1793800800.0  # 2026-11-04T14:00:00Z, a fixed study-time origin


def stamp(t: float) -> str:
    return time.strftime("%Y%m%dT%H%M%SZ", time.gmtime(t))


def iso(t: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(t))


def make_home(root, policy_name: str = "default", **retention):
    """A created home with a policy copied in (``retention`` overrides keys of [retention])."""
    from agent.home import Home

    h = Home(root).create()
    text = (REPO / "policies" / f"{policy_name}.toml").read_text()
    for k, v in retention.items():
        import re

        text = re.sub(rf"(?m)^{k} = .*$", f"{k} = {v}", text)
    h.policy_path.write_text(text)
    if not h.exists():
        h.write_config({})  # marks the home as initialised for the CLI
    return h


def wav_bytes(seconds: float = 3.0, sr: int = 16000, freq: float = 440.0, amp: float = 0.1, seed: int = 0) -> bytes:
    import soundfile as sf

    rng = np.random.default_rng(seed)
    t = np.arange(int(seconds * sr)) / sr
    y = amp * np.sin(2 * np.pi * freq * t) + 0.01 * rng.standard_normal(t.size)
    buf = io.BytesIO()
    sf.write(buf, y.astype(np.float32), sr, format="WAV", subtype="PCM_16")
    return buf.getvalue()


def accel_bytes(t0: float = T0, seconds: float = 60.0, rate_hz: float = 10.0, seed: int = 0) -> bytes:
    rng = np.random.default_rng(seed)
    n = int(seconds * rate_hz)
    t = t0 + np.arange(n) / rate_hz
    xyz = np.column_stack([0.02 * rng.standard_normal(n), 0.02 * rng.standard_normal(n),
                           1.0 + 0.02 * rng.standard_normal(n)])
    body = "\n".join(f"{a:.3f},{x:.4f},{y:.4f},{z:.4f}" for a, (x, y, z) in zip(t, xyz, strict=True))
    return f"# unit=g rate_hz={rate_hz:g}\ntime,x,y,z\n{body}\n".encode()


def gps_csv_bytes(t0: float = T0, n: int = 12, step_s: float = 300.0, lat: float = 38.53, lon: float = -28.63,
                  jitter_deg: float = 0.0001, seed: int = 0) -> bytes:
    rng = np.random.default_rng(seed)
    rows = [f"{iso(t0 + i * step_s)},{lat + jitter_deg * rng.standard_normal():.6f},"
            f"{lon + jitter_deg * rng.standard_normal():.6f},10" for i in range(n)]
    return ("time,lat,lon,accuracy_m\n" + "\n".join(rows) + "\n").encode()


def mood_csv_bytes(policy, t0: float = T0, n: int = 2) -> bytes:
    emotions = list(policy.schedule.emotions)
    lo, hi = policy.schedule.mood_scale_min, policy.schedule.mood_scale_max
    rows = [",".join([iso(t0 + 3600 * i)] + [str(lo + (i + j) % (hi - lo + 1)) for j in range(len(emotions))])
            for i in range(n)]
    return (",".join(["time"] + emotions) + "\n" + "\n".join(rows) + "\n").encode()


def valid_set(policy, t0: float = T0) -> dict[str, bytes]:
    """One valid file of each kind, keyed by name."""
    return {
        f"snd_{stamp(t0)}.wav": wav_bytes(seed=int(t0) % 100003),
        f"burst_{stamp(t0)}.accel.csv": accel_bytes(t0, seed=int(t0) % 100003),
        f"loc_{stamp(t0)}.gps.csv": gps_csv_bytes(t0, seed=int(t0) % 100003),
        f"prompt_{stamp(t0)}.mood.csv": mood_csv_bytes(policy, t0),
    }


def drop(inbox, name: str, data: bytes, *, settle_s: float = 0.0) -> Path:
    """Write a file the way a careful recorder does: a ``.part`` then a rename into place."""
    inbox = Path(inbox)
    tmp = inbox / f"{name}.part"
    tmp.write_bytes(data)
    os.replace(tmp, inbox / name)
    return inbox / name


def age_files(inbox, seconds: float = 5.0) -> None:
    """Back-date mtimes so a drain does not wait for the settle time (ctime stays now)."""
    now = time.time()
    for p in Path(inbox).iterdir():
        if p.is_file() and not p.is_symlink():
            os.utime(p, (now - seconds, now - seconds))


def our_files(inbox) -> list[str]:
    """Entries a drain must have removed: everything except subdirectories."""
    return sorted(p.name for p in Path(inbox).iterdir() if p.is_symlink() or not p.is_dir())


def copy_policy(dst, name="default"):
    shutil.copy(REPO / "policies" / f"{name}.toml", dst)
