"""Loopback load test of the study server: 1,000 devices upload one bundle each, concurrently.

Run: ``/work/venv/bin/python benchmarks/bench_server.py [--devices 1000] [--concurrency 100] [--postgres]``.

1. The server (``lethe study serve`` in a child process, SQLite WAL by default,
   PostgreSQL with ``--postgres`` and ``$LETHE_TEST_POSTGRES_URL``) gets 1,000
   enrolments (not timed), then 1,000 bundles from 1,000 devices at once
   (``--concurrency`` requests in flight); latency per upload p50/p99.
   Reference in the same run: ``GET /v1`` (TLS + HTTP + JSON, no verification,
   no database) at the same concurrency.
2. Again with each device's next bundle, and the server SIGKILLed half-way and
   restarted; clients retry with back-off until acknowledged.  Counted: lost
   (acknowledged or sent but not in the database), duplicated (rows per
   device and sequence number above one), "already have" answers.
3. Service time: 200 uploads one at a time (nothing queued in front of the
   server), against ``GET /v1`` one at a time.

Loopback only.  The clients run on the same cores as the server.  Nothing here
is asserted; figures go to docs/benchmarks.md.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import random
import secrets
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start(study, db, port):
    from _bundle_fixtures import PASS

    env = dict(os.environ, LETHE_STUDY_PASSPHRASE=PASS.decode(), LETHE_DASHBOARD_PASSWORD="bench-password",
               PYTHONPATH=str(ROOT))
    p = subprocess.Popen([sys.executable, "-c", "import sys; from agent.cli import main; sys.exit(main())",
                          "study", "serve", "--dir", str(study), "--port", str(port), "--self-signed",
                          "--database", db, "--rate-per-minute", "600"], env=env, stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE)
    line = p.stdout.readline().decode()
    if "lethe study server" not in line:
        raise SystemExit(p.stderr.read().decode())
    return p


def pct(v, q):
    v = sorted(v)
    return v[min(len(v) - 1, int(round(q / 100 * (len(v) - 1))))] if v else None


async def upload_all(url, ctx, items, concurrency, *, kill_after=None, on_kill=None, path="/v1/bundles"):
    """POST every item until acknowledged; returns latencies of successful first tries and counters."""
    import httpx

    sem = asyncio.Semaphore(concurrency)
    lat, stats = [], {"ok": 0, "already": 0, "retries": 0, "errors": 0}
    done = 0
    killed = asyncio.Event()
    rng = random.Random(1)
    limits = httpx.Limits(max_connections=concurrency, max_keepalive_connections=concurrency)
    async with httpx.AsyncClient(base_url=url, verify=ctx, timeout=60, limits=limits) as c:

        async def one(data):
            nonlocal done
            attempt = 0
            while True:
                async with sem:
                    t = time.perf_counter()
                    try:
                        if path == "/v1":
                            r = await c.get(path)
                        else:
                            r = await c.post(path, content=data, headers={"Content-Type": "application/octet-stream"})
                        code = r.status_code
                    except (httpx.HTTPError, OSError):
                        code = None
                    dt = time.perf_counter() - t
                if code in (200, 201):
                    if attempt == 0:
                        lat.append(dt)
                    stats["ok"] += 1
                    if path != "/v1" and r.json().get("status") == "already have":
                        stats["already"] += 1
                    done += 1
                    if kill_after is not None and done == kill_after and not killed.is_set():
                        killed.set()
                        await on_kill()
                    return
                if code is not None and 400 <= code < 500 and code not in (408, 429):
                    stats["errors"] += 1
                    return
                attempt += 1
                stats["retries"] += 1
                await asyncio.sleep(rng.uniform(0, min(5.0, 0.2 * 2 ** attempt)))  # full jitter

        await asyncio.gather(*(one(d) for d in items))
    return lat, stats


def run(backend: str, n: int, concurrency: int) -> dict:
    import sqlalchemy as sa
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

    from _bundle_fixtures import Study, make_payload
    from agent.study.card import make_enrolment
    from agent.study.server.store import Store, bundles_t
    from agent.study.server.tls import cert_pin, self_signed
    from agent.uploader import pinned_context

    tmp = Path(tempfile.mkdtemp(prefix="lethe-bench-server-"))
    s = Study(tmp)
    admin = None
    if backend == "postgresql":
        base = os.environ["LETHE_TEST_POSTGRES_URL"]
        name = "lethe_bench_" + secrets.token_hex(4)
        admin = sa.create_engine(base.replace("postgresql://", "postgresql+psycopg://"), isolation_level="AUTOCOMMIT")
        with admin.connect() as c:
            c.execute(sa.text(f'CREATE DATABASE "{name}"'))
        db = base.rsplit("/", 1)[0] + "/" + name
    else:
        db = f"sqlite:///{tmp / 'server.db'}"
    cert, _ = self_signed(s.dir)
    pin = cert_pin(cert.read_bytes())
    store = Store(db, "harbour-days-2027")
    codes = store.invite(n)
    port = free_port()
    url = f"https://127.0.0.1:{port}"
    server = start(s.dir, db, port)
    out: dict = {"backend": backend, "devices": n, "concurrency": concurrency,
                 "load_average_1min_before": round(os.getloadavg()[0], 1)}
    try:
        ctx = pinned_context(url, pin)
        devices = [Ed25519PrivateKey.generate() for _ in range(n)]
        payload = make_payload(s.policy)
        enrol = [json.dumps({"invitation": codes[i], "enrolment": make_enrolment(
            s.card, s.policy, f"pLoad{i:05d}", d)}).encode() for i, d in enumerate(devices)]

        async def enrol_all():
            import httpx

            async with httpx.AsyncClient(base_url=url, verify=ctx, timeout=60) as c:
                sem = asyncio.Semaphore(concurrency)

                async def one(b):
                    async with sem:
                        r = await c.post("/v1/enrolments", content=b, headers={"Content-Type": "application/json"})
                        assert r.status_code == 201, r.text
                await asyncio.gather(*(one(b) for b in enrol))
        t = time.perf_counter()
        asyncio.run(enrol_all())
        out["enrol_s"] = round(time.perf_counter() - t, 1)
        first = [s.seal(payload, seq=1, device=d) for d in devices]
        second = [s.seal(payload, seq=2, device=d) for d in devices]

        lat, _ = asyncio.run(upload_all(url, ctx, [b""] * n, concurrency, path="/v1"))
        out["reference_get_v1_ms"] = {"p50": round(pct(lat, 50) * 1e3, 1), "p99": round(pct(lat, 99) * 1e3, 1)}

        t = time.perf_counter()
        lat, st = asyncio.run(upload_all(url, ctx, first, concurrency))
        out["upload"] = {"wall_s": round(time.perf_counter() - t, 1), "p50_ms": round(pct(lat, 50) * 1e3, 1),
                         "p99_ms": round(pct(lat, 99) * 1e3, 1), **st}

        state = {"server": server}

        async def kill_and_restart():
            state["server"].send_signal(signal.SIGKILL)
            state["server"].wait()
            await asyncio.sleep(0.5)
            state["server"] = await asyncio.to_thread(start, s.dir, db, port)

        t = time.perf_counter()
        lat, st = asyncio.run(upload_all(url, ctx, second, concurrency, kill_after=n // 2,
                                         on_kill=kill_and_restart))
        server = state["server"]
        with store.engine.connect() as c:
            rows = c.execute(sa.select(bundles_t.c.pseudonym, bundles_t.c.seq)).all()
        per = {}
        for r in rows:
            per[(r[0], int(r[1]))] = per.get((r[0], int(r[1])), 0) + 1
        expected = {(f"pLoad{i:05d}", q) for i in range(n) for q in (1, 2)}
        out["kill_restart"] = {"wall_s": round(time.perf_counter() - t, 1), "p50_ms": round(pct(lat, 50) * 1e3, 1),
                               "p99_ms": round(pct(lat, 99) * 1e3, 1), **st,
                               "lost": len(expected - set(per)), "duplicated": sum(v - 1 for v in per.values()),
                               "stored": len(per)}
        # Service time: one upload at a time (no queueing in front of the server), 200 devices.
        k = min(200, n)
        third = [s.seal(payload, seq=3, device=d) for d in devices[:k]]
        lat, st = asyncio.run(upload_all(url, ctx, third, 1))
        out["one_at_a_time"] = {"uploads": k, "p50_ms": round(pct(lat, 50) * 1e3, 1),
                                "p99_ms": round(pct(lat, 99) * 1e3, 1), **st}
        lat, _ = asyncio.run(upload_all(url, ctx, [b""] * k, 1, path="/v1"))
        out["one_at_a_time_reference_get_v1_ms"] = {"p50": round(pct(lat, 50) * 1e3, 1),
                                                    "p99": round(pct(lat, 99) * 1e3, 1)}
        out["load_average_1min_after"] = round(os.getloadavg()[0], 1)
    finally:
        server.send_signal(signal.SIGKILL)
        server.wait()
        store.close()
        if admin is not None:
            with admin.connect() as c:
                c.execute(sa.text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
            admin.dispose()
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--devices", type=int, default=1000)
    ap.add_argument("--concurrency", type=int, default=100)
    ap.add_argument("--postgres", action="store_true", help="also PostgreSQL ($LETHE_TEST_POSTGRES_URL)")
    a = ap.parse_args()
    print(json.dumps(run("sqlite", a.devices, a.concurrency), indent=1), flush=True)
    if a.postgres:
        print(json.dumps(run("postgresql", a.devices, a.concurrency), indent=1), flush=True)


if __name__ == "__main__":
    main()
