"""``lethe study plan``: how many participants and answered trials a study needs, by simulation, on Dask.

The question: with ``n`` participants answering ``m`` trials each, how often
does the study detect that the model predicts participants' choices better
than the frequency rival (a one-sided paired t-test of the held-out
log-likelihood difference at level ``alpha``)?  Power is the share of
simulated studies in which it does.

Each synthetic participant is generated and *fitted* as a real study would
fit them, with a deliberately small generative model so thousands of fits
run in seconds (a planning device, not the device-side model):

* every trial offers ``n_options`` places; each option has a retrieval
  activation ``a`` (what the model computes from the cue) and a familiarity
  ``f`` (what the frequency rival uses), standard normal with correlation
  ``rho``;
* the participant chooses with probabilities ``softmax(beta_i * a + gamma * f)``,
  ``beta_i ~ Normal(beta, beta_sd)`` per participant;
* the model ``softmax(b * a)`` and the rival ``softmax(c * f)`` are fitted by
  maximum likelihood (``b, c`` in [0, 20]) on half of the trials and scored on
  the other half, and the other way round (2-fold cross-validation); the
  participant's difference is the held-out log-likelihood per trial, model
  minus rival.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable
from dataclasses import asdict, dataclass

import numpy as np


@dataclass(frozen=True)
class PlanModel:
    """The generative model's parameters (validated)."""

    beta: float = 1.0
    beta_sd: float = 0.5
    gamma: float = 0.5
    rho: float = 0.3
    n_options: int = 4

    def __post_init__(self):
        if not (0 <= self.beta <= 20 and 0 <= self.beta_sd <= 10 and 0 <= self.gamma <= 20):
            raise ValueError("beta, gamma: expected 0..20; beta_sd: expected 0..10")
        if not -0.99 <= self.rho <= 0.99:
            raise ValueError(f"rho: expected a correlation in [-0.99, 0.99], got {self.rho}")
        if not isinstance(self.n_options, int) or not 2 <= self.n_options <= 20:
            raise ValueError(f"n_options: expected an integer 2..20, got {self.n_options!r}")


def _loglik(w: float, x: np.ndarray, choice: np.ndarray) -> float:
    """Mean log-likelihood per trial of ``choice`` under ``softmax(w * x)`` (x: trials x options)."""
    z = w * x
    z = z - z.max(axis=1, keepdims=True)
    logp = z - np.log(np.exp(z).sum(axis=1, keepdims=True))
    return float(logp[np.arange(len(choice)), choice].mean())


def fit_weight(x: np.ndarray, choice: np.ndarray) -> float:
    """Maximum-likelihood weight of a one-parameter softmax choice rule, bounded to [0, 20]."""
    from scipy.optimize import minimize_scalar

    r = minimize_scalar(lambda w: -_loglik(w, x, choice), bounds=(0.0, 20.0), method="bounded",
                        options={"xatol": 1e-4})
    return float(r.x)


def simulate_participant(rng: np.random.Generator, n_trials: int, m: PlanModel) -> tuple[float, float]:
    """One synthetic participant, fitted: ``(held-out loglik difference model - rival, fitted b)``."""
    k = m.n_options
    a = rng.standard_normal((n_trials, k))
    f = m.rho * a + np.sqrt(1 - m.rho**2) * rng.standard_normal((n_trials, k))
    beta_i = max(0.0, rng.normal(m.beta, m.beta_sd))
    z = beta_i * a + m.gamma * f
    p = np.exp(z - z.max(axis=1, keepdims=True))
    p /= p.sum(axis=1, keepdims=True)
    choice = (p.cumsum(axis=1) > rng.random((n_trials, 1))).argmax(axis=1)
    half = np.arange(n_trials) % 2 == 0
    diff, bs = 0.0, []
    for train, test in ((half, ~half), (~half, half)):
        b = fit_weight(a[train], choice[train])
        c = fit_weight(f[train], choice[train])
        diff += (_loglik(b, a[test], choice[test]) - _loglik(c, f[test], choice[test])) * test.sum()
        bs.append(b)
    return diff / n_trials, float(np.mean(bs))


def simulate_fits(seed: int, count: int, n_trials: int, model: dict) -> np.ndarray:
    """``count`` participants from one seed; one Dask task.  Returns an array (count, 2)."""
    m = PlanModel(**model)
    rng = np.random.default_rng(seed)
    return np.array([simulate_participant(rng, n_trials, m) for _ in range(count)])


def _power_of(diffs: np.ndarray, n_participants: int, n_studies: int, alpha: float) -> tuple[float, float]:
    """Share of studies (rows of ``n_participants`` differences) with a one-sided t-test p < alpha."""
    from scipy import stats

    d = diffs[: n_studies * n_participants].reshape(n_studies, n_participants)
    t = d.mean(axis=1) / (d.std(axis=1, ddof=1) / np.sqrt(n_participants))
    p = stats.t.sf(t, df=n_participants - 1)
    return float(np.mean(p < alpha)), float(d.mean())


def plan(n_participants=(20, 40, 80), n_trials=(40, 80), *, model: PlanModel | None = None, n_studies: int = 200,
         alpha: float = 0.05, target_power: float = 0.8, seed: int = 0, scheduler: str | None = None,
         n_workers: int = 2, per_task: int = 200, progress: Callable[[int, int], None] | None = None,
         client=None) -> dict:
    """Power for each (participants, trials) design; the cheapest design reaching ``target_power``.

    ``n_studies`` simulated studies per design; every study's participants are
    simulated and fitted independently on the Dask workers (tasks of
    ``per_task`` participants).
    """
    from .dask_util import dask_client, run_tasks

    model = model or PlanModel()
    ns, ms = sorted(set(int(x) for x in n_participants)), sorted(set(int(x) for x in n_trials))
    if not ns or min(ns) < 3 or not ms or min(ms) < 4:
        raise ValueError("n_participants: expected integers >= 3; n_trials: integers >= 4")
    if not 0 < alpha < 0.5 or not 0 < target_power < 1 or n_studies < 10:
        raise ValueError("alpha in (0, 0.5), target_power in (0, 1), n_studies >= 10 expected")
    # One pool of simulated participants per trial count, big enough for the largest design.
    jobs = []
    for mi, m in enumerate(ms):
        need = n_studies * max(ns)
        for j, start in enumerate(range(0, need, per_task)):
            jobs.append((mi, (seed * 1_000_003 + mi * 10_007 + j, min(per_task, need - start), m, asdict(model))))
    with dask_client(scheduler, n_workers, client=client) as c:
        res = run_tasks(c, simulate_fits, [a for _, a in jobs], progress)
    pools: dict[int, list[np.ndarray]] = {}
    for (mi, _), r in zip(jobs, res, strict=True):
        pools.setdefault(mi, []).append(r)
    grid = []
    for (mi, m), n in itertools.product(enumerate(ms), ns):
        allp = np.concatenate(pools[mi])
        power, mean_diff = _power_of(allp[:, 0], n, n_studies, alpha)
        grid.append({"participants": n, "trials": m, "power": power, "mean_difference": mean_diff,
                     "sd_difference": float(allp[:, 0].std(ddof=1)), "answers": n * m})
    ok = [g for g in grid if g["power"] >= target_power]
    best = min(ok, key=lambda g: (g["answers"], g["participants"])) if ok else None
    return {"model": asdict(model), "alpha": alpha, "target_power": target_power, "n_studies": n_studies,
            "fits": int(sum(len(r) for r in res)) * 4, "participants_simulated": int(sum(len(r) for r in res)),
            "grid": grid, "smallest": best}


def plan_text(res: dict) -> str:
    m = res["model"]
    lines = [f"power by simulation: {res['n_studies']} studies per design, alpha {res['alpha']}, "
             f"{res['participants_simulated']} synthetic participants fitted "
             f"(beta {m['beta']} ± {m['beta_sd']}, frequency weight {m['gamma']}, {m['n_options']} options)",
             "participants  trials  power  mean difference (held-out loglik per trial)"]
    for g in res["grid"]:
        lines.append(f"{g['participants']:12d}  {g['trials']:6d}  {g['power']:5.2f}  {g['mean_difference']:+.4f}")
    s = res["smallest"]
    lines.append(f"smallest design with power >= {res['target_power']}: "
                 + (f"{s['participants']} participants x {s['trials']} answered trials" if s else
                    "none in this grid; try more participants or trials"))
    return "\n".join(lines)
