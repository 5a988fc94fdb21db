"""SIMULATED memory-test answers and place names for the fictional participant.

Nothing here is a real person's answer.  The demo has no participant at the
keyboard, so this module plays one: it knows the ground truth (where the
fictional participant really was, from :class:`~agent.demo.generator.Timeline`)
and answers the quiz from a documented memory process that is none of the
candidate models' own tables (not the frequency table, not the eigenvector
model, not ACT-R's base level), so the demo's comparison between them is not
decided in advance.  Every answer carries ``source = "simulated"`` so it can
never be mistaken for a real one.

The memory process, per trial (probed hour ``h``, age ``a`` days at the test):

1. **Episodic recall.**  With probability ``RECALL_MAX * 2^(-a / RECALL_HALF_LIFE_DAYS)``
   the participant recalls the episode itself: the place where she really was.
2. **Reconstruction** otherwise: she recalls *some* hour like it, one trace
   drawn from her whole past (every hour of the timeline before the test), with
   weight ``2^(-age / GIST_HALF_LIFE_DAYS)`` times 1 for the same clock hour,
   ``NEIGHBOUR_HOUR`` for the hours either side and 0 otherwise (weekday
   ignored), and takes its place.
3. **Confusion.**  With probability ``CONFUSION`` the remembered place is
   replaced by another place that shares context with it (same type, such as
   two cafés, or the same sound environment), uniformly among those.
4. **Answer.**  If the remembered place is among the options she picks it;
   else an option sharing context with it (uniformly), else any option.  With
   probability ``SLIP`` she picks uniformly at random whatever she remembers.

With probability ``skip_probability`` (scenario ``[answers]``) she skips.
Response times are log-normal around ``rt_median_s``, a little slower when the
answer is wrong (common practice, no source).  The scenario's older score keys
(``true_bonus``, ``habit_weight``, ``temperature``) are no longer read.
Device place ids are mapped to true places by majority over the episodes
carrying them.  The constants are a plausible fiction (no source): recall of
where one was falls off over days to weeks, and errors are pulled towards what
one usually does at that time and towards similar places.
"""

from __future__ import annotations

import math
from collections import Counter, defaultdict
from datetime import datetime

import numpy as np

SOURCE = "simulated"
RECALL_MAX = 0.9
RECALL_HALF_LIFE_DAYS = 7.0
GIST_HALF_LIFE_DAYS = 10.0
NEIGHBOUR_HOUR = 0.5
CONFUSION = 0.2
SLIP = 0.05
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


class HourTraces:
    """Every whole hour of the timeline: its UTC start, local clock hour and dominant place."""

    def __init__(self, truth):
        tz = truth.scenario.tz
        t0 = math.ceil(truth.start_utc / 3600.0) * 3600.0
        ts, hours, places = [], [], []
        t = t0
        while t + 3600.0 <= truth.end_utc:
            p = truth.dominant_place(t, t + 3600.0)
            if p is not None:
                ts.append(t)
                hours.append(datetime.fromtimestamp(t, tz).hour)
                places.append(p)
            t += 3600.0
        self.t = np.array(ts, dtype=np.float64)
        self.hour = np.array(hours, dtype=np.int64)
        self.place = np.array(places, dtype=object)

    def gist_weights(self, hour: int, now: float) -> np.ndarray:
        """Weights of step 2 (reconstruction) over the traces before ``now``."""
        dh = np.abs(self.hour - int(hour)) % 24
        dh = np.minimum(dh, 24 - dh)
        near = np.where(dh == 0, 1.0, np.where(dh == 1, NEIGHBOUR_HOUR, 0.0))
        age_d = (now - self.t) / 86400.0
        return np.where(age_d > 0, near * np.exp2(-np.maximum(age_d, 0.0) / GIST_HALF_LIFE_DAYS), 0.0)


def context_neighbours(scenario) -> dict[str, list[str]]:
    """Places sharing context with each place: the same type or the same sound environment."""
    places = scenario.places
    return {a: sorted(b for b in places if b != a and (places[b].type == places[a].type
                                                        or places[b].sound == places[a].sound))
            for a in places}


def remember(where, hour: int, age_days: float, now: float, traces: HourTraces,
             similar: dict, rng) -> str | None:
    """Steps 1-3 of the memory process: the place the participant remembers."""
    if where is not None and rng.random() < RECALL_MAX * 2.0 ** (-age_days / RECALL_HALF_LIFE_DAYS):
        place = where
    else:
        w = traces.gist_weights(hour, now)
        if w.sum() <= 0:
            return None
        place = str(traces.place[int(rng.choice(len(w), p=w / w.sum()))])
    if rng.random() < CONFUSION and similar.get(place):
        place = str(rng.choice(similar[place]))
    return place


def answer_from_memory(remembered, options, mapping, similar, rng) -> str:
    """Step 4: the option picked for a remembered place."""
    if rng.random() < SLIP or remembered is None:
        return options[int(rng.integers(len(options)))]
    same = [o for o in options if mapping.get(o) == remembered]
    if same:
        return same[int(rng.integers(len(same)))]
    near = [o for o in options if mapping.get(o) in set(similar.get(remembered, ()))]
    pool = near or options
    return pool[int(rng.integers(len(pool)))]


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
    traces = HourTraces(truth)
    similar = context_neighbours(truth.scenario)
    clock: dict[float, float] = {}
    out = []
    for tr in trials:
        options = list(tr["options"])
        ep = by_key.get(tr["episode"])
        issued = float(tr.get("issued_at", truth.end_utc))
        if ep is None or not options:
            choice = None
        else:
            t0 = float(ep["utc"])
            where = truth.dominant_place(t0, t0 + 3600.0)
            hour = int(tr.get("hour", ep.get("hour", 0)))
            age_days = max(issued - t0, 0.0) / 86400.0
            place = remember(where, hour, age_days, issued, traces, similar, rng)
            pick = answer_from_memory(place, options, mapping, similar, rng)
            choice = None if rng.random() < cfg["skip_probability"] else pick
        rt = float(rng.lognormal(math.log(cfg["rt_median_s"]), cfg["rt_sigma"]))
        if choice is not None and choice != tr.get("correct", choice):
            rt *= WRONG_RT_FACTOR
        rt = round(min(max(rt, 0.6), 60.0), 3)
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
