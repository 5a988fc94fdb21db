"""Synthetic participants for tests, recovery and the benchmark (no personal data).

``routine_episodes`` writes hourly episodes (the Episodes contract) of a person
with a weekly routine: home at night, work on weekday office hours, lunch out,
evening activities, weekend outings, with place-dependent sounds, a motion level
and one or two moods.  ``quiz_trials`` probes some of those hours with
``options`` places (the true one and uniformly drawn foils), and
``simulate_choices`` answers them from the model with known parameters.
"""

from __future__ import annotations

from datetime import date, timedelta

import numpy as np

from .choice import log_probabilities, simulate_choices
from .design import TrialDesign, as_model_graph
from .likelihood import ActivationCache

EMOTIONS = ("happy", "calm", "excited", "proud", "grateful", "bored",
            "tired", "anxious", "sad", "angry", "lonely")
SOUND_OF = {"P1": ["S1", "S2"], "P2": ["S3", "S4"], "P3": ["S5"], "P4": ["S6"],
            "P5": ["S5", "S2"], "P6": ["S6"], "P7": ["S5"], "P8": ["S2"], "P9": ["S6"],
            "P10": ["S5"]}


def _place(rng, weekday, hour):
    if hour < 7 or hour >= 22:
        return "P1"
    if weekday < 5:
        if 9 <= hour < 12 or 13 <= hour < 17:
            return "P2" if rng.random() < 0.9 else "P3"
        if hour == 12:
            return rng.choice(["P3", "P5", "P2"], p=[0.5, 0.3, 0.2])
        if 18 <= hour < 20 and weekday in (1, 3):
            return "P4"
        if hour == 8 or hour == 17:
            return None if rng.random() < 0.5 else "P1"  # commute: no stay
        return "P1" if rng.random() < 0.8 else rng.choice(["P6", "P7"])
    if 10 <= hour < 18:
        return rng.choice(["P1", "P6", "P7", "P8", "P9", "P10"], p=[0.3, 0.2, 0.15, 0.15, 0.1, 0.1])
    return "P1"


def routine_episodes(days: int = 14, seed: int = 0, start: date = date(2026, 11, 2)) -> list[dict]:
    """Hourly episodes of ``days`` days for a synthetic routine (Episodes contract)."""
    rng = np.random.default_rng(seed)
    out = []
    t0 = 1793577600.0  # an arbitrary UTC origin; only order matters to the graph
    for d in range(days):
        day = start + timedelta(days=d)
        wd = day.weekday()
        for h in range(24):
            place = _place(rng, wd, h)
            if place is not None:
                place = str(place)
            sound = str(rng.choice(SOUND_OF[place])) if place is not None and rng.random() < 0.9 else None
            motion = ("sedentary" if place in ("P1", "P2") and rng.random() < 0.8
                      else ("active" if place in ("P4", "P9") else "light"))
            if h < 7:
                moods = []
            else:
                k = int(rng.integers(1, 3))
                moods = sorted(set(str(m) for m in rng.choice(EMOTIONS, k)))
            out.append({"key": f"{day.isoformat()}T{h:02d}:00+00:00", "utc": t0 + 86400 * d + 3600 * h,
                        "date": day.isoformat(), "hour": h, "weekday": wd, "week": d // 7 + 1,
                        "place": place, "sound": sound, "motion": motion, "moods": moods,
                        "coverage": {"gps_s": 3600.0, "audio_n": 6, "accel_s": 3600.0, "mood": bool(moods)}})
    return out


def quiz_trials(episodes, n_trials: int, options: int = 4, seed: int = 0,
                foils: str = "uniform") -> list[dict]:
    """Probe ``n_trials`` hours with a known place.

    Foils are drawn from the other places uniformly (``foils="uniform"``) or in
    proportion to how often each was visited (``"frequency"``, frequency-matched:
    the usual places are then foils as often as they are answers), as
    ``quiz.foils`` does in :func:`agent.quiz.generate_trials`.
    """
    if foils not in ("uniform", "frequency"):
        raise ValueError(f"foils {foils!r}: expected 'uniform' or 'frequency'")
    rng = np.random.default_rng(seed)
    known = [e for e in episodes if e.get("place") is not None]
    places = sorted({e["place"] for e in known})
    visits = {p: sum(1 for e in known if e["place"] == p) for p in places}
    if len(places) < options:
        raise ValueError(f"need at least {options} distinct places for {options} options, got {len(places)}")
    pick = rng.choice(len(known), size=min(n_trials, len(known)), replace=False)
    out = []
    for i, j in enumerate(sorted(pick)):
        e = known[j]
        pool = [p for p in places if p != e["place"]]
        if foils == "frequency":
            w = np.array([visits[p] for p in pool], dtype=float)
            drawn = rng.choice(pool, options - 1, replace=False, p=w / w.sum())
        else:
            drawn = rng.choice(pool, options - 1, replace=False)
        opts = [e["place"]] + [str(f) for f in drawn]
        rng.shuffle(opts)
        out.append({"trial_id": f"T{i:04d}", "episode": e["key"], "date": e["date"], "hour": e["hour"],
                    "weekday": e["weekday"], "week": e["week"], "options": [str(o) for o in opts],
                    "correct": e["place"]})
    return out


def model_log_probabilities_for(graph, design: TrialDesign, theta: dict, beta: float, tau: float):
    mg = as_model_graph(graph)
    cache = ActivationCache(mg, design)
    act = cache.activations(mg.theta_vector(theta), beta)
    return log_probabilities(act, design.opt_mask, tau)


def simulate_answers(graph, trials, theta: dict, beta: float, tau: float, seed: int = 0) -> list[dict]:
    """The trials with ``choice`` drawn from the model with the given parameters."""
    mg = as_model_graph(graph)
    design = TrialDesign(mg, trials)
    lp = model_log_probabilities_for(mg, design, theta, beta, tau)
    pos = simulate_choices(lp, design.opt_mask, np.random.default_rng(seed))
    return [dict(t, choice=design.options[i][pos[i]]) for i, t in enumerate(trials)]
