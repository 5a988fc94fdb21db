"""The watching agent codes features into IDs on its own schedule."""

from __future__ import annotations

import threading
import time

import pytest


@pytest.mark.slow
def test_watching_agent_codes_features_periodically(home, default_policy, repo):
    import shutil

    from agent.demo.generator import Scenario, simulate_days, write_day
    from agent.intake.watcher import run_agent
    from agent.keystore import Keystore
    from agent.ledger import Ledger
    from agent.vault import Vault

    shutil.copy(repo / "policies" / "default.toml", home.policy_path)
    home.write_config({"timezone": "Atlantic/Azores", "enrolled_at": time.time() - 3 * 86400})
    Keystore(home).ensure()
    stop = threading.Event()
    ready = threading.Event()
    t = threading.Thread(target=run_agent, args=(home, default_policy),
                         kwargs=dict(stop_event=stop, on_ready=lambda s: ready.set(), maintenance_every_s=1.0))
    t.start()
    try:
        assert ready.wait(60)
        tl = simulate_days(Scenario.load(), time.time() - 3 * 86400, 1, 5)
        write_day(tl, 0, home.inbox, default_policy, 5)
        deadline = time.time() + 120
        while time.time() < deadline:
            events = [e["event"] for e in Ledger(home).entries()]
            last_destroyed = max((i for i, e in enumerate(events) if e == "destroyed"), default=None)
            if (last_destroyed is not None and not list(home.inbox.iterdir())
                    and "coded" in events[last_destroyed:]):
                break  # a coding pass ran after the last file was taken in
            time.sleep(0.5)
    finally:
        stop.set()
        t.join(60)
    assert not t.is_alive()
    assert list(home.inbox.iterdir()) == []
    with Vault.open(home) as v:
        assert v.count("episodes") > 0          # the agent itself coded the features into hourly IDs
        assert v.count("codebook") == 3
        assert v.count("accel_features") == 0   # and the coded features are gone
