"""A simulated recorder for trying lethe on an enrolled home: ``lethe simulate``.

It writes the fictional scenario's raw drops (``docs/demo.md``) into the home's
inbox, one simulated day at a time, the way a recorder syncing its backlog
would.  After each day it waits for a running agent (``lethe run`` or the
service) to empty the inbox; when no agent holds the home, it drains the inbox
itself so that no file outlives the retention window.

The simulated days are ``days`` whole local days ending before today, so that the
memory test (which asks about hours 7 to 21 days old) has something to ask
about.  Because those days precede the enrolment made a moment ago, the home's
study start (``enrolled_at``) is moved back to the first simulated day: this
is a demo tool, it refuses a home that has already received real data.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

from ..errors import StateError
from ..home import Home

DAY_S = 86400.0


def _has_received(home: Home) -> bool:
    from ..ledger import Ledger

    if not home.ledger_path.exists():
        return False
    return any(e.get("event") == "received" for e in Ledger(home).entries())


def _agent_holds_lock(home: Home) -> bool:
    from ..participant.status import agent_running

    return bool(agent_running(home))


def record(home, days: int = 14, seed: int = 7, *, wait_s: float = 60.0, say=print) -> dict:
    """Write ``days`` simulated days into ``home``'s inbox and see them taken in."""
    from ..demo.generator import Scenario, simulate_days, write_day, write_truth
    from ..intake.pipeline import drain

    home = home if isinstance(home, Home) else Home(home)
    home.require()
    if days < 1:
        raise StateError(f"--days must be at least 1, got {days}")
    if _has_received(home):
        raise StateError(f"{home.root}: this home has already received raw data; the simulated "
                         f"recorder only fills a freshly enrolled home")
    policy = home.load_policy()
    now = time.time()
    # whole local days, the last one ending before today: nothing lies in the future
    timeline = simulate_days(Scenario.load(), now - (days + 1) * DAY_S, days, seed)
    home.update_config(enrolled_at=float(timeline.start_utc), simulated=True)
    truth = write_truth(timeline, home.state / "demo-truth.json")
    totals: dict[str, Any] = {"files": 0, "drained_here": 0}
    for day in range(days):
        files = write_day(timeline, day, home.inbox, policy, seed)
        totals["files"] += len(files)
        if _agent_holds_lock(home):
            deadline = time.monotonic() + wait_s
            while any(not p.name.startswith(".") for p in home.inbox.iterdir()):
                if time.monotonic() > deadline:
                    raise StateError(f"{home.inbox}: the running agent has not taken the files in "
                                     f"{wait_s:g} s; is it paused or stuck? ('lethe status')")
                time.sleep(0.2)
            say(f"day {day + 1}/{days}: {len(files)} files, taken in by the running agent")
        else:
            with home.lock("simulate"):
                rep = drain(home, policy)
            totals["drained_here"] += sum(rep.destroyed.values())
            say(f"day {day + 1}/{days}: {len(files)} files, featurised and destroyed "
                f"(no agent was running, so this command drained the inbox itself)")
    totals["truth"] = str(Path(truth))
    return totals
