"""Pause state: while paused, raw files are still destroyed on time but nothing is kept.

The state is one small JSON file, ``HOME/state/pause.json``::

    {"paused": true, "since": 1764633600.0, "until": 1764637200.0}   # until: null = until resumed

A pause with an ``until`` ends by itself: :func:`is_paused` reads it as over
once ``now >= until`` (no process has to be running to end it).  Pausing and
resuming are recorded in the ledger as ``paused{until}`` and ``resumed``.
"""

from __future__ import annotations

import json
import math
import time

from .errors import StateError
from .fsutil import write_private
from .home import Home


def _home(home) -> Home:
    return home if isinstance(home, Home) else Home(home)


def read_pause(home) -> dict:
    """The stored pause state; ``{"paused": False, ...}`` when there is none."""
    h = _home(home)
    try:
        raw = json.loads(h.pause_path.read_text("utf-8"))
    except FileNotFoundError:
        return {"paused": False, "since": None, "until": None}
    except (OSError, ValueError) as e:
        raise StateError(f"{h.pause_path}: unreadable pause state ({e}); "
                         f"run 'lethe resume' or 'lethe pause' to rewrite it") from None
    if not isinstance(raw, dict) or not isinstance(raw.get("paused"), bool):
        raise StateError(f"{h.pause_path}: expected {{'paused': bool, 'since': float, 'until': float|null}}")
    return {"paused": raw["paused"], "since": raw.get("since"), "until": raw.get("until")}


def is_paused(home, now: float | None = None) -> bool:
    """True while a pause is in force; a pause whose ``until`` has passed is over.

    An unreadable state file counts as paused: when in doubt, keep nothing.
    """
    try:
        st = read_pause(home)
    except StateError:
        return True
    if not st["paused"]:
        return False
    until = st["until"]
    if until is None:
        return True
    now = time.time() if now is None else float(now)
    return now < float(until)


def set_paused(home, until: float | None = None, ledger=None, now: float | None = None) -> dict:
    """Pause intake until ``until`` (Unix seconds) or, with ``None``, until resumed.

    Parameters
    ----------
    home : Home or path-like
    until : float, optional
        When the pause ends by itself; must be in the future.
    ledger : agent.ledger.Ledger, optional
        Receives ``paused{until}``.
    now : float, optional
        The current time (Unix seconds); for tests and the demo's clock.
    """
    now = time.time() if now is None else float(now)
    if until is not None:
        until = float(until)
        if not math.isfinite(until) or until <= now:
            raise StateError(f"pause end {until!r} must be a finite time after now ({now:.0f})")
    state = {"paused": True, "since": now, "until": until}
    write_private(_home(home).pause_path, json.dumps(state, sort_keys=True).encode())
    if ledger is not None:
        ledger.append("paused", until=until)
    return state


def clear_pause(home, ledger=None) -> dict:
    """End a pause now (idempotent); records ``resumed`` if a pause was in force."""
    h = _home(home)
    was = is_paused(h)
    state = {"paused": False, "since": None, "until": None}
    write_private(h.pause_path, json.dumps(state, sort_keys=True).encode())
    if ledger is not None and was:
        ledger.append("resumed")
    return state
