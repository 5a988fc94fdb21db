"""A panel of simulated participant types, to test that the comparison machinery is honest.

Each type answers the same trials of a synthetic routine
(:mod:`.synthetic`) by a known process:

``model``
    the cue-biased eigenvector model at known parameters (default: every
    weight class 1, β = 0.5 relative to λ1, τ = 0.5);
``habit``
    the frequency table of the participant's own episodes (hour x weekday,
    every episode, the probed one included: a habit is what one usually does),
    Luce rule ``p ∝ (1 + n(h, d, p))^(1/HABIT_TAU)``;
``recency``
    the most recent visits at the probed clock hour before the test, weighted
    ``exp(-age / RECENCY_DAYS)`` (an exponential forgetting curve, not ACT-R's
    power law), Luce rule with exponent ``1/RECENCY_TAU``;
``random``
    uniform over the options.

Whatever the model's result on real people, on these panels the comparison
must come out as designed: random answers give intervals that include chance,
model answers make the model win its paired comparisons, habit answers make the
frequency table win.  The tests in ``tests/test_model_panel.py`` check it.
"""

from __future__ import annotations

from collections import Counter

import numpy as np

from .choice import log_probabilities, simulate_choices, uniform_log_probabilities
from .design import TrialDesign, as_model_graph
from .likelihood import ActivationCache, ModelSpec, model_log_probabilities

TYPES = ("model", "habit", "recency", "random")
HABIT_TAU = 0.5
RECENCY_DAYS = 3.0
RECENCY_TAU = 0.5
MODEL_PARAMS = {"theta": 1.0, "beta": 2.0, "tau": 0.5}


def model_params(spec: ModelSpec, theta: float = 1.0, beta: float = 0.5, tau: float = 0.5) -> np.ndarray:
    """Packed parameters with every free weight class at ``theta``."""
    return spec.pack(np.full(len(spec.group_names), float(theta)), beta, tau)


def type_log_probabilities(kind: str, graph, design: TrialDesign, episodes, *, p=None) -> np.ndarray:
    """Log-probabilities of every option under a participant type."""
    if kind not in TYPES:
        raise ValueError(f"participant type {kind!r}: expected one of {list(TYPES)}")
    mask = design.opt_mask
    if kind == "random":
        return uniform_log_probabilities(mask)
    if kind == "model":
        mg = as_model_graph(graph)
        spec = ModelSpec.full(mg)
        p = model_params(spec, **MODEL_PARAMS) if p is None else p
        return model_log_probabilities(spec, ActivationCache(mg, design), p)
    eps = [e for e in episodes if e.get("place") is not None]
    scores = np.zeros(mask.shape)
    if kind == "habit":
        n = Counter((int(e["hour"]), int(e["weekday"]), str(e["place"])) for e in eps)
        for t, opts in enumerate(design.options):
            h, d = int(design.hours[t]), int(design.weekdays[t])
            scores[t, : len(opts)] = [np.log1p(n[(h, d, o)]) for o in opts]
        return log_probabilities(scores, mask, HABIT_TAU)
    utc = np.array([float(e["utc"]) for e in eps])
    hour = np.array([int(e["hour"]) for e in eps])
    place = np.array([str(e["place"]) for e in eps], dtype=object)
    now = float(utc.max()) + 3600.0
    for t, opts in enumerate(design.options):
        at = hour == int(design.hours[t])
        w = np.exp(-(now - utc[at]) / 86400.0 / RECENCY_DAYS)
        pl = place[at]
        scores[t, : len(opts)] = [np.log(w[pl == o].sum() + 1e-3) for o in opts]
    return log_probabilities(scores, mask, RECENCY_TAU)


def simulate_type(kind: str, graph, trials, episodes, seed: int = 0, *, p=None) -> list[dict]:
    """The trials with ``choice`` drawn from a participant type."""
    mg = as_model_graph(graph)
    design = TrialDesign(mg, [dict(t, choice=None) for t in trials])
    lp = type_log_probabilities(kind, mg, design, episodes, p=p)
    pos = simulate_choices(lp, design.opt_mask, np.random.default_rng(seed))
    return [dict(t, choice=design.options[i][pos[i]]) for i, t in enumerate(trials)]


def panel_participant(kind: str, *, days: int = 28, n_trials: int = 200, seed: int = 0,
                      cap_rule: str | None = None, degree_cap: int | None = None, foils: str = "uniform"):
    """A synthetic participant of one type: ``(episodes, graph, trials with choices)``."""
    from ..graph import CooccurrenceGraph
    from .synthetic import quiz_trials, routine_episodes

    eps = routine_episodes(days, seed=seed)
    g = CooccurrenceGraph.from_episodes(eps, cap_rule=cap_rule, degree_cap=degree_cap)
    trials = quiz_trials(eps, n_trials, seed=seed + 1, foils=foils)
    return eps, g, simulate_type(kind, g, trials, eps, seed=seed + 2)
