"""SIMULATED memory-test answers and place names for the fictional participant.

Nothing here is a real person's answer.  The demo has no participant at the
keyboard, so this module plays one: it knows the ground truth (where the
fictional participant really was, from :class:`~agent.demo.generator.Timeline`)
and answers the quiz noisily, with a pull towards habitual places, the way a
person's memory for "where was I last Tuesday at 3 pm?" is pulled towards
where they usually are at that time.  Every answer carries ``source =
"simulated"`` so it can never be mistaken for a real one.

Choice rule (parameters in the scenario's ``[answers]`` table):

    score(option) = true_bonus  * [option's true place is where she was]
                  + habit_weight * habit(option's true place, hour, weekday)
    P(option)     = softmax(score / temperature)

``habit(place, hour, weekday)`` is the share of that weekday's occurrences of
that local hour, over the whole timeline, that the participant spent mostly at
the place, blended 70/30 with the share over all weekdays at that hour (so a
habit seen on one weekday still counts a little on the others).  Device place
ids are mapped to true places by majority over the episodes carrying them.
With probability ``skip_probability`` the participant skips (choice None).
Response times are log-normal around ``rt_median_s``, a little slower when
the answer is wrong (common practice, no source).
"""

from __future__ import annotations

import math
from collections import Counter, defaultdict
from datetime import datetime

import numpy as np

SOURCE = "simulated"
WEEKDAY_BLEND = 0.7  # weight of the same-weekday habit against the any-weekday habit
WRONG_RT_FACTOR = 1.25
READ_S = 1.5  # time between one answer and the next trial appearing


def true_place_map(episodes, truth) -> dict[str, str | None]:
    """Device place id -> the scenario place it stands for (majority over episodes)."""
    votes: dict[str, Counter] = defaultdict(Counter)
    for e in episodes:
        pid = e.get("place")
        if pid is None:
            continue
        t0 = float(e["utc"])
        votes[pid][truth.dominant_place(t0, t0 + 3600.0)] += 1
    out = {}
    for pid, c in votes.items():
        # ties are broken by name so the mapping does not depend on dict order
        out[pid] = max(sorted(c, key=lambda k: (k is None, str(k))), key=lambda k: c[k])
    return out


class HabitTable:
    """How often the participant is (mostly) at each place, by local weekday and hour."""

    def __init__(self, truth):
        tz = truth.scenario.tz
        self.by_wd_hour: dict[tuple[int, int], Counter] = defaultdict(Counter)
        self.by_hour: dict[int, Counter] = defaultdict(Counter)
        t = math.ceil(truth.start_utc / 3600.0) * 3600.0
        while t + 3600.0 <= truth.end_utc:
            local = datetime.fromtimestamp(t, tz)
            p = truth.dominant_place(t, t + 3600.0)
            self.by_wd_hour[(local.weekday(), local.hour)][p] += 1
            self.by_hour[local.hour][p] += 1
            t += 3600.0

    def habit(self, place, hour: int, weekday: int) -> float:
        if place is None:
            return 0.0
        a = self.by_wd_hour.get((weekday, hour), Counter())
        b = self.by_hour.get(hour, Counter())
        sa = a[place] / sum(a.values()) if a else 0.0
        sb = b[place] / sum(b.values()) if b else 0.0
        return WEEKDAY_BLEND * sa + (1.0 - WEEKDAY_BLEND) * sb


def simulate_answers(trials, episodes, truth, seed: int) -> list[dict]:
    """Simulated answers, one per trial, in the quiz's answer format.

    Parameters
    ----------
    trials : list of dict
        Trials as issued by the quiz (``trial_id``, ``episode`` key, ``hour``,
        ``weekday``, ``options``, ``issued_at``).
    episodes : list of dict
        The device's episodes (``key``, ``utc``, ``place``); they give each
        trial's hour and the device-id-to-place mapping.
    truth : Timeline
        Ground truth from :func:`agent.demo.generator.simulate_days` or
        :func:`~agent.demo.generator.load_truth`.
    seed : int
        Same seed, same answers.

    Returns
    -------
    list of dict
        ``{"trial_id", "choice", "rt_s", "answered_at", "source": "simulated"}``;
        ``choice`` is an option id or None (skipped, or the trial's episode is
        unknown).
    """
    cfg = truth.scenario.answers
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 31]))
    by_key = {e["key"]: e for e in episodes}
    mapping = true_place_map(episodes, truth)
    habits = HabitTable(truth)
    clock: dict[float, float] = {}
    out = []
    for tr in trials:
        options = list(tr["options"])
        ep = by_key.get(tr["episode"])
        if ep is None or not options:
            choice = None
        else:
            t0 = float(ep["utc"])
            where = truth.dominant_place(t0, t0 + 3600.0)
            hour = int(tr.get("hour", ep.get("hour", 0)))
            weekday = int(tr.get("weekday", ep.get("weekday", 0)))
            score = np.array([
                cfg["true_bonus"] * (where is not None and mapping.get(o) == where)
                + cfg["habit_weight"] * habits.habit(mapping.get(o), hour, weekday)
                for o in options], dtype=float) / cfg["temperature"]
            p = np.exp(score - score.max())
            pick = options[int(rng.choice(len(options), p=p / p.sum()))]
            choice = None if rng.random() < cfg["skip_probability"] else pick
        rt = float(rng.lognormal(math.log(cfg["rt_median_s"]), cfg["rt_sigma"]))
        if choice is not None and choice != tr.get("correct", choice):
            rt *= WRONG_RT_FACTOR
        rt = round(min(max(rt, 0.6), 60.0), 3)
        issued = float(tr.get("issued_at", truth.end_utc))
        # answers of one session follow each other in time
        at = max(issued, clock.get(issued, issued)) + rt
        clock[issued] = at + READ_S
        out.append({"trial_id": tr["trial_id"], "choice": choice, "rt_s": rt,
                    "answered_at": round(at, 3), "source": SOURCE})
    return out


UNKNOWN_NAME = "somewhere on the way"


def simulate_place_names(episodes, truth) -> dict[str, str]:
    """The fictional participant's own names for the device's place ids.

    Each device id gets the scenario name of the place it mostly stands for
    (``"home"``, ``"the office"``, ``"Marta's flat"``).  If the device split one
    real place into several ids, the id seen most keeps the plain name and the
    others get ``"<name> (2)"``, ``"(3)"``...  An id that mostly stands for
    travel gets ``"somewhere on the way"``.
    """
    mapping = true_place_map(episodes, truth)
    seen = Counter(e.get("place") for e in episodes if e.get("place") is not None)
    names: dict[str, str] = {}
    used: Counter = Counter()
    for pid in sorted(mapping, key=lambda p: (-seen[p], p)):
        true = mapping[pid]
        base = truth.scenario.places[true].name if true in truth.scenario.places else UNKNOWN_NAME
        used[base] += 1
        names[pid] = base if used[base] == 1 else f"{base} ({used[base]})"
    return names
