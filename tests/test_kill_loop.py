"""Issue 12's kill test: 100 SIGKILLs at random moments 0.3-3 s after each start while files arrive.

Checks, against the ledger and the vault (not against the agent's own report):

* 0 lost: every file that arrived was destroyed, and has an outcome (featurised, or rejected with a reason);
* 0 duplicated: one ``intake_items`` marker per distinct content, and feature rows exactly as many as a
  clean in-process run over the same files gives;
* 0 past the limit: no ``destroyed`` entry with ``exposure_s`` above ``retention.raw_seconds``, and no raw
  file seen in the inbox older than that while the test ran;
* the ledger verifies (chain, signatures, anchor, nothing pending).

Long (about 3 minutes on 2 cores): marked slow.
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import threading
import time

import pytest

from intake_samples import REPO, T0, accel_bytes, drop, gps_csv_bytes, make_home, mood_csv_bytes, our_files, stamp

SEED = 20261202
KILLS = 100
ARRIVAL_S = 0.4          # one file every 0.4 s while the kills go on

CHILD = r"""
import sys
from agent.home import Home
from agent.intake.watcher import run_agent
h = Home(sys.argv[1])
run_agent(h, h.load_policy(), once=sys.argv[2] == "once", settle_s=0.0, warm=False)
"""


def _file(policy, i: int) -> tuple[str, bytes]:
    t = T0 + 3600.0 * i
    kind = i % 4
    if kind == 0:
        return f"burst_{stamp(t)}.accel.csv", accel_bytes(t, seed=i)
    if kind == 1:
        return f"loc_{stamp(t)}.gps.csv", gps_csv_bytes(t, seed=i)
    if kind == 2:
        return f"bad_{i}.mood.csv", f"time,happy\nnot a time {i},3\n".encode()
    return f"prompt_{stamp(t)}.mood.csv", mood_csv_bytes(policy, t)


@pytest.mark.slow
@pytest.mark.timeout(600)
def test_100_sigkills_while_files_arrive(tmp_path):
    from agent.intake.pipeline import drain
    from agent.ledger import Ledger, verify_ledger
    from agent.vault import Vault

    env = dict(os.environ, PYTHONPATH=str(REPO))
    h = make_home(tmp_path / "kill")
    policy = h.load_policy()
    limit = policy.retention.raw_seconds
    rng = random.Random(SEED)

    arrived: list[str] = []
    stop = threading.Event()
    worst_age = [0.0]

    def feeder():
        i = 0
        while not stop.is_set():
            name, data = _file(policy, i)
            drop(h.inbox, name, data)
            arrived.append(name)
            i += 1
            stop.wait(ARRIVAL_S)

    def watcher():
        while not stop.is_set():
            now = time.time()
            for d, _, fs in os.walk(h.inbox):
                for f in fs:
                    try:
                        st = os.lstat(os.path.join(d, f))
                    except FileNotFoundError:
                        continue
                    worst_age[0] = max(worst_age[0], now - max(st.st_mtime, st.st_ctime))
            stop.wait(0.05)

    threads = [threading.Thread(target=feeder), threading.Thread(target=watcher)]
    for t in threads:
        t.start()
    lives = []
    try:
        for _ in range(KILLS):
            life = rng.uniform(0.3, 3.0)
            t0 = time.monotonic()
            child = subprocess.Popen([sys.executable, "-c", CHILD, str(h.root), "watch"], cwd=REPO, env=env,
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            time.sleep(max(0.0, life - (time.monotonic() - t0)))
            child.send_signal(signal.SIGKILL)
            child.wait(30)
            lives.append(life)
    finally:
        stop.set()
        for t in threads:
            t.join()
    final = subprocess.run([sys.executable, "-c", CHILD, str(h.root), "once"], cwd=REPO, env=env,
                           capture_output=True, text=True, timeout=300)
    assert final.returncode == 0, final.stderr

    # 0 lost: everything that arrived is gone, and each distinct content has exactly one outcome chain.
    assert our_files(h.inbox) == []
    entries = list(Ledger(h).entries())
    received = {e["item"] for e in entries if e["event"] == "received"}
    outcome = {e["item"] for e in entries if e["event"] in ("featurised", "rejected")}
    destroyed = {e["item"] for e in entries if e["event"] == "destroyed"}
    assert received == destroyed and received <= outcome
    n_distinct = len(set(arrived))
    assert len(received) == n_distinct, (len(received), n_distinct)

    # 0 duplicated: the vault equals a clean in-process run over the same files.
    clean = make_home(tmp_path / "clean")
    for i in range(len(arrived)):
        name, data = _file(policy, i)
        drop(clean.inbox, name, data)
    drain(clean, policy, settle_s=0.0)
    with Vault.open(h) as v, Vault.open(clean) as c:
        got, want = v.tables(), c.tables()
    # Files the restarts reached too close to their deadline were destroyed unparsed by the retention rule
    # (rejected retention_deadline): their rows are missing, never any others'.  Item ids are keyed per
    # home, so the two homes' items are compared by count.
    featurised = {e["item"] for e in entries if e["event"] == "featurised"}
    unparsed = {e["item"] for e in entries if e.get("reason") == "retention_deadline"} - featurised
    for table in ("intake_items", "accel_features", "mood_reports"):
        if not unparsed:
            assert got.get(table, 0) == want.get(table, 0), (table, got, want)
        else:
            assert got.get(table, 0) <= want.get(table, 0), (table, got, want)
    assert want.get("intake_items", 0) - got.get("intake_items", 0) <= len(unparsed)

    # 0 past the limit.
    late = [e["exposure_s"] for e in entries if e["event"] == "destroyed" and e["exposure_s"] > limit]
    assert late == [], f"{len(late)} files destroyed past the {limit} s limit (worst {max(late)} s)"
    assert worst_age[0] <= limit, f"a raw file was seen {worst_age[0]:.1f} s after completion"

    report = verify_ledger(h)
    assert report.ok, (report.problems, report.violations)
    assert report.pending == []
    print(f"\nkill test: {KILLS} kills, lives {min(lives):.2f}-{max(lives):.2f} s, {len(arrived)} files, "
          f"worst age seen {worst_age[0]:.2f} s, {len(unparsed)} destroyed unparsed at the deadline, max exposure "
          f"{max(e['exposure_s'] for e in entries if e['event'] == 'destroyed'):.2f} s")
