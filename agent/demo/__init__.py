"""The fictional demo: scenario, raw-data generator, soundscapes and simulated answers.

Everything here describes an invented participant in an invented town placed on
open ocean; see ``docs/demo.md``.  Typical use::

    from agent.demo import Scenario, simulate_days, write_day, write_truth
    sc = Scenario.load()
    tl = simulate_days(sc, start_utc, days=14, seed=0)
    write_truth(tl, work / "truth.json")          # outside the inbox
    for i in range(tl.days):
        write_day(tl, i, home.inbox, policy, seed=0)
"""

from .generator import (Timeline, load_truth, simulate_days, write_day, write_days,  # noqa: F401
                        write_truth)
from .scenario import Scenario, default_scenario_path  # noqa: F401

__all__ = ["Scenario", "Timeline", "simulate_days", "write_day", "write_days", "write_truth",
           "load_truth", "default_scenario_path", "simulate_answers", "simulate_place_names"]


def __getattr__(name):
    # answers.py is imported on first use so the generator never pays for it
    if name in ("simulate_answers", "simulate_place_names"):
        from . import answers

        return getattr(answers, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
