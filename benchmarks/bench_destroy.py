"""Destruction cost: sparse files (issue 12, finding 2) and dense files, with a same-run reference.

    python benchmarks/bench_destroy.py [--dir DIR]

Figures (each the median of 5 runs, on the file system holding DIR, default a temporary directory):

* ``agent.destroy.destroy_path`` on a 4 GiB and a 1 TiB sparse file holding 8 KiB of data, and on a
  dense 16 MiB file (the default ``intake.max_file_bytes``);
* the reference: writing and fsyncing 64 MiB of zeros in the same run, from which the time the old
  whole-apparent-size overwrite would have needed for the 4 GiB file is extrapolated (it is not run:
  it would write 4 GiB).
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

MiB = 1 << 20


def _sparse(path: Path, size: int) -> None:
    with open(path, "wb") as f:
        f.truncate(size)
        f.seek(size // 2)
        f.write(b"\x7f" * 8192)


def _dense(path: Path, size: int) -> None:
    with open(path, "wb") as f:
        f.write(os.urandom(size))
        f.flush()
        os.fsync(f.fileno())


def _time(make, destroy, n=5) -> tuple[float, int]:
    times, written = [], 0
    for _ in range(n):
        make()
        t0 = time.perf_counter()
        d = destroy()
        times.append(time.perf_counter() - t0)
        written = d
    return statistics.median(times), written


def main(argv=None) -> int:
    from agent.destroy import destroy_path

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--dir", default=None)
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(dir=args.dir) as d:
        p = Path(d) / "x.wav"
        cap = 16 * MiB
        rows = []
        for label, size in (("sparse 4 GiB, 8 KiB of data", 4 << 30), ("sparse 1 TiB, 8 KiB of data", 1 << 40)):
            t, n = _time(lambda s=size: _sparse(p, s), lambda: destroy_path(p, max_bytes=cap).overwritten_bytes)
            rows.append((label, t, n))
        t, n = _time(lambda: _dense(p, cap), lambda: destroy_path(p, max_bytes=cap).overwritten_bytes)
        rows.append(("dense 16 MiB", t, n))
        # Reference: plain zeros, 64 MiB, fsynced.
        ref = []
        for _ in range(3):
            t0 = time.perf_counter()
            with open(p, "wb") as f:
                for _ in range(64):
                    f.write(b"\0" * MiB)
                f.flush()
                os.fsync(f.fileno())
            ref.append(time.perf_counter() - t0)
            os.unlink(p)
        mib_s = 64 / statistics.median(ref)
    print(f"{'file':32} {'destroy (median)':>16} {'bytes overwritten':>18}")
    for label, t, n in rows:
        print(f"{label:32} {t * 1000:13.2f} ms {n:18d}")
    print(f"reference: zeros written and fsynced at {mib_s:.0f} MiB/s in this run; the old overwrite of the "
          f"4 GiB sparse file's apparent size would take about {4096 / mib_s:.1f} s (and write 4 GiB)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
