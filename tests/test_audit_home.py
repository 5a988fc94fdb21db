"""A synthetic lethe home with a real signed ledger, for the audit tests.

``build_home`` writes entries through the real :class:`agent.ledger.Ledger`
and :class:`agent.keystore.Keystore` with an injected clock, so the ledger is
exactly what the agent would write for the given timings.  Other audit test
modules import it from here.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np

from agent.home import Home
from agent.keystore import Keystore
from agent.ledger import Ledger
from agent.policy import bundled_policy_path, load_policy

T0 = 1_790_000_000.0  # 2026-09-21 UTC; any fixed instant will do
KINDS = ("audio", "gps", "accel", "mood")


def build_home(root, *, policy: str = "default", passphrase: bytes | None = None, items: int = 60,
               days: int = 3, seed: int = 0, late: int = 0, never_destroyed: int = 0,
               rejections: dict | None = None, exports: int = 2) -> Path:
    """Create a home at ``root`` with ``items`` raw items spread over ``days`` days.

    ``late`` items are destroyed after the policy limit; ``never_destroyed``
    items are received and never destroyed.  Exposures of the rest are drawn
    uniformly below the limit.  Returns the home root.
    """
    rng = np.random.default_rng(seed)
    home = Home(root).create()
    pol_path = bundled_policy_path(policy)
    shutil.copyfile(pol_path, home.policy_path)
    pol = load_policy(pol_path)
    limit = pol.retention.raw_seconds
    ks = Keystore(home, passphrase=passphrase, use_keyring=False).ensure()
    events = [(T0, 0, "agent_start", dict(version="0.1.0")),
              (T0 + 0.01, 1, "policy", dict(fingerprint=pol.fingerprint, name=pol.policy.name,
                                            version=pol.policy.version))]
    rejections = dict(rejections if rejections is not None else {"bad_header": 2, "too_large": 1})
    reasons = [r for r, n in rejections.items() for _ in range(n)]
    n_total = items + len(reasons)
    starts = np.sort(rng.uniform(T0 + 60, T0 + days * 86400 - 600, n_total))
    order = rng.permutation(n_total)
    rejected_idx = set(order[:len(reasons)].tolist())
    late_idx = set(order[len(reasons):len(reasons) + late].tolist())
    never_idx = set(order[len(reasons) + late:len(reasons) + late + never_destroyed].tolist())
    export_times = list(np.linspace(T0 + 86400 * 0.9, T0 + days * 86400 - 3600, exports)) if exports else []
    r_iter = iter(reasons)
    # (t, order, event, fields): appended in time order, as the agent would
    for i, complete_at in enumerate(starts):
        kind = KINDS[i % len(KINDS)]
        item = f"{i:032x}"
        t = float(complete_at + 0.05)
        events.append((t, len(events), "received",
                       dict(item=item, kind=kind, bytes=1000 + i, complete_at=float(complete_at))))
        if i in rejected_idx:
            events.append((t + 0.1, len(events), "rejected", dict(item=item, kind=kind, reason=next(r_iter))))
        else:
            events.append((t + 0.1, len(events), "featurised", dict(item=item, kind=kind, rows=1)))
        if i in never_idx:
            continue
        exposure = (limit + rng.uniform(1, 20)) if i in late_idx else rng.uniform(0.3, 0.8 * limit)
        events.append((float(complete_at + exposure), len(events), "destroyed",
                       dict(item=item, kind=kind, complete_at=float(complete_at), exposure_s=float(exposure))))
    for j, t in enumerate(export_times):
        events.append((float(t), len(events), "exported", dict(bundle_seq=j + 1, digest=f"{j + 1:064x}")))
    events.sort(key=lambda e: (e[0], e[1]))
    events.append((events[-1][0] + 1.0, len(events), "agent_stop", dict(reason="done")))
    # One batched append (one fsync); the ledger asks the clock once per entry.
    clock = iter([t for t, *_ in events]).__next__
    Ledger(home, signing_key=ks.device_key(), clock=clock).append_many([(e, f) for _, _, e, f in events])
    return home.root


def ledger_exposures(root) -> np.ndarray:
    """Independent exposure computation: destroyed.t minus received.complete_at, from the raw lines."""
    complete = {}
    out = []
    for line in Path(root, "ledger.jsonl").read_text("utf-8").splitlines():
        e = json.loads(line)
        if e["event"] == "received":
            complete[e["item"]] = e["complete_at"]
        elif e["event"] == "destroyed":
            out.append(e["t"] - complete[e["item"]])
    return np.asarray(out)


# -- the builder itself --------------------------------------------------------

def test_builder_writes_a_verifying_ledger(tmp_path):
    from agent.ledger import verify_ledger

    root = build_home(tmp_path / "h", items=20, days=1)
    rep = verify_ledger(root, now=T0 + 2 * 86400)
    assert rep.ok, rep.summary()
    assert rep.counts["received"] == 23 and rep.counts["destroyed"] == 23


def test_builder_late_items_are_violations(tmp_path):
    from agent.ledger import verify_ledger

    root = build_home(tmp_path / "h", items=20, days=1, late=2)
    rep = verify_ledger(root, now=T0 + 2 * 86400)
    assert [v["check"] for v in rep.violations] == ["late", "late"]
