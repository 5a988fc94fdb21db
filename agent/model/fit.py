"""Fit the model to the participant's own choices and report it beside the baselines.

:func:`fit_model` fits the cue-biased eigenvector model on every answered trial
(the reported parameters), then cross-validates the model and each baseline on
the same day folds (the reported metrics).  The likelihood is that of the
participant's *choices*; the true place is used only to score accuracy.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np
from scipy.sparse.csgraph import connected_components

from ..errors import DataError, StateError
from .compare import information_criteria, paired_differences
from .crossval import chance_metrics, cross_validate, score_fitted
from .rivals import LABELS as RIVAL_LABELS
from .recovery import recover, recovery_summary
from .rivals import centrality_spec, model_and_rivals
from .baselines import EigenModel
from .likelihood import GROUPING_CANDIDATES, WEIGHTS, ModelSpec
from .design import TrialDesign, as_model_graph, cue_kind_weights

DEFAULT_FOLDS = 5
DEFAULT_RESTARTS = 1
DEFAULT_RECOVERY_SIMS = 30
# Screening recovery per candidate grouping: half the simulations (at least
# SCREEN_MIN_SIMS); the chosen grouping's is then extended to the full count,
# reusing the screening refits (docs/model.md, "Choosing the grouping").
SCREEN_MIN_SIMS = 10
GROUPING_RULE = ("candidates whose parameters all reach recovery r >= 0.7 around their own fit "
                 "(screening); among them the best pooled held-out log-likelihood on the same day "
                 "folds; if none qualifies, the fewest unidentifiable parameters, then held-out "
                 "log-likelihood")


def choose_grouping(table: list[dict], *, forced: bool = False) -> tuple[str, str]:
    """The weight grouping to report, and why (:data:`GROUPING_RULE`).

    Parameters
    ----------
    table : list of dict
        One row per candidate: ``weights`` (name), ``loglik`` (pooled held-out
        log-likelihood per trial), ``unidentifiable`` (list of parameter names
        with recovery r < 0.7, or None when recovery was not run).
    forced : bool
        A single grouping asked for by the caller (``--weights``).

    Returns
    -------
    (str, str)
        The chosen grouping and a one-line reason.
    """
    if not table:
        raise ValueError("choose_grouping: expected at least one candidate grouping")
    if forced or len(table) == 1:
        return table[0]["weights"], "asked for (--weights)" if forced else "the only candidate"

    def ll(row):
        v = row["loglik"]
        return v if v is not None and np.isfinite(v) else -np.inf

    if any(row["unidentifiable"] is None for row in table):
        best = max(table, key=ll)
        return best["weights"], "best held-out log-likelihood (no recovery was run)"
    ok = [row for row in table if not row["unidentifiable"]]
    if ok:
        best = max(ok, key=ll)
        others = [row["weights"] for row in table if row["unidentifiable"]]
        why = (f"every parameter identifiable (recovery r >= 0.7); best held-out log-likelihood "
               f"{ll(best):.3f} among {', '.join(row['weights'] for row in ok)}")
        if others:
            why += f" (left out, not identifiable: {', '.join(others)})"
        return best["weights"], why
    fewest = min(len(row["unidentifiable"]) for row in table)
    tied = [row for row in table if len(row["unidentifiable"]) == fewest]
    best = max(tied, key=ll)
    return best["weights"], (f"no grouping has every parameter identifiable; fewest not identifiable "
                             f"({fewest}: {', '.join(best['unidentifiable'])}), then best held-out "
                             f"log-likelihood {ll(best):.3f}")
LABELS = {"model": "cue-biased eigenvector", **RIVAL_LABELS}


@dataclass
class FitResult:
    """Fitted parameters, cross-validated metrics of the model and of every baseline."""

    params: dict
    cv: dict
    baselines: dict
    n_trials: int
    n_answered: int
    n_skipped: int
    fit: dict = field(default_factory=dict)
    chance_level: dict = field(default_factory=dict)
    participant_accuracy: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)
    paired: dict = field(default_factory=dict)
    in_sample: dict = field(default_factory=dict)
    recovery: dict | None = None
    grouping: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        """JSON-ready record (``docs/architecture.md``, Model; stored as vault ``fits/latest``)."""
        return _plain({
            "params": self.params, "cv": self.cv, "baselines": self.baselines,
            "n_trials": self.n_trials, "n_answered": self.n_answered, "n_skipped": self.n_skipped,
            "fit": self.fit, "chance_level": self.chance_level,
            "participant_accuracy": self.participant_accuracy, "notes": self.notes,
            "paired": self.paired, "in_sample": self.in_sample, "recovery": self.recovery,
            "grouping": self.grouping,
        })

    def table(self) -> str:
        return render_table(self.to_dict())

    def summary(self) -> dict:
        """Pooled held-out values only (no per-fold detail), for status lines and the demo."""
        def pooled(res):
            p = res["pooled"]
            return {"agreement": p["agreement"]["value"], "agreement_ci": p["agreement"]["ci"],
                    "accuracy": p["accuracy"]["value"], "loglik": p["loglik"]["value"]}

        return _plain({"params": {k: self.params[k] for k in ("theta", "beta", "tau")},
                       "n_answered": self.n_answered, "model": pooled(self.cv),
                       "baselines": {k: pooled(v) for k, v in self.baselines.items()},
                       "paired_loglik": {k: v["loglik"] for k, v in self.paired.items()},
                       "chance_level": self.chance_level})


def _plain(o):
    if isinstance(o, dict):
        return {str(k): _plain(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_plain(v) for v in o]
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return [_plain(v) for v in o.tolist()]
    if isinstance(o, float) and not np.isfinite(o):
        return None
    return o


def _policy_int(policy, section, key, default):
    if policy is None:
        return default
    return int(getattr(getattr(policy, section), key))


def fit_model(graph, trials_with_answers, policy=None, seed: int = 0, *, episodes=None,
              folds: int | None = None, restarts: int | None = None,
              weights: str = "auto", n_jobs: int | None = None,
              recovery_sims: int | None = None) -> FitResult:
    """Fit the model on the participant's choices; cross-validate it and the baselines.

    Parameters
    ----------
    graph : CooccurrenceGraph or ModelGraph
        Anything with ``capped``, ``kinds`` and ``index``.
    trials_with_answers : sequence of dict
        Trials (Quiz contract) each with a ``choice`` (``None``: skipped).
    policy : Policy, optional
        ``model.folds`` and ``model.restarts`` (defaults 5 and 4).
    seed : int
        Seeds restarts, fold assignment and bootstrap.
    episodes : sequence of dict, optional
        For the rivals that count visits (most-visited, frequency, ACT-R);
        without them the frequency rival uses the graph's counts and the others
        are left out.
    weights : {"auto", "grouped", "classes5", "classes2", "full"}
        ``"auto"`` (default): every grouping of
        :data:`~agent.model.likelihood.GROUPING_CANDIDATES` is fitted on the same
        folds, each gets a screening recovery around its own fit, and
        :func:`choose_grouping` picks one (``FitResult.grouping`` says which and
        why).  A name forces that grouping.
    n_jobs : int, optional
        Worker processes for the fits (default: every usable core).
    recovery_sims : int, optional
        Simulations of the parameter recovery run after the fit at this
        participant's own trials and graph (default ``model.recovery_sims``,
        30 without a policy; 0 skips it).  Parameters recovered with
        ``r < 0.7`` are marked not identifiable.
    """
    from threadpoolctl import threadpool_limits

    # graphs here have tens to hundreds of nodes: one BLAS thread is faster than
    # several (thread start-up dominates an eigh of that size)
    with threadpool_limits(limits=1, user_api="blas"):
        return _fit_model(graph, trials_with_answers, policy, seed, episodes, folds, restarts, weights,
                          n_jobs, recovery_sims)


def _adopt(pred: EigenModel, fitted: EigenModel) -> EigenModel:
    """``pred`` (unfitted) carrying the fit of ``fitted``, an equivalent spec fitted the same way."""
    import copy

    if (pred.spec.free != fitted.spec.free or pred.spec.fit_beta != fitted.spec.fit_beta
            or pred.spec.beta_fixed != fitted.spec.beta_fixed or pred.spec.prior != fitted.spec.prior
            or pred.spec.reference != fitted.spec.reference or tuple(pred.spec.zero) != tuple(fitted.spec.zero)
            or pred.spec.weights != fitted.spec.weights):
        raise ValueError(f"{pred.name}: the fitted {fitted.name!r} model has a different specification")
    out = copy.copy(pred)
    out.p, out.objective, out.nll = fitted.p, fitted.objective, fitted.nll
    out.converged, out.n_eigh, out.runs = fitted.converged, fitted.n_eigh, list(fitted.runs)
    return out


def _fit_model(graph, trials_with_answers, policy, seed, episodes, folds, restarts, weights,
               n_jobs, recovery_sims) -> FitResult:
    t0 = time.perf_counter()
    mg = as_model_graph(graph)
    if not mg.type_pairs:
        raise DataError("fit: the graph has no edges; nothing to fit")
    design = TrialDesign(mg, trials_with_answers)
    n_ans = int(design.answered.sum())
    if n_ans == 0:
        raise DataError("fit: no answered trials (every trial was skipped or none exist)")
    k = folds if folds is not None else _policy_int(policy, "model", "folds", DEFAULT_FOLDS)
    r = restarts if restarts is not None else _policy_int(policy, "model", "restarts", DEFAULT_RESTARTS)
    notes = []

    sims = (recovery_sims if recovery_sims is not None
            else _policy_int(policy, "model", "recovery_sims", DEFAULT_RECOVERY_SIMS))
    sims = max(int(sims), 3) if sims else 0
    if weights == "auto":
        candidates = list(GROUPING_CANDIDATES)
    elif weights in WEIGHTS:
        candidates = [weights]
    else:
        raise ValueError(f"weights {weights!r}: expected 'auto' or one of {list(WEIGHTS)}")
    # Phase 1: every candidate grouping of the model and the rivals that do not
    # depend on the grouping, on the same day folds; phase 2 (after the choice):
    # the centrality rival under the chosen grouping.
    rivals = model_and_rivals(mg, episodes=episodes, restarts=r, seed=seed, weights=candidates[0])
    preds = {f"model:{w}": EigenModel(ModelSpec.full(mg, weights=w), restarts=r, seed=seed)
             for w in candidates}
    preds.update({k: v for k, v in rivals.items() if k not in ("model", "centrality")})
    cv_all = cross_validate(preds, design, k, seed, n_jobs=n_jobs, in_sample=True, keep_fits=True)
    full = cv_all.pop("_fitted")
    fold_fits = cv_all.pop("_fold_fits")
    answered = design.subset(np.flatnonzero(design.answered))
    t_full = time.perf_counter() - t0

    screen = sims if len(candidates) == 1 else max(SCREEN_MIN_SIMS, sims // 2) if sims else 0
    screened: dict = {}
    for w in candidates:
        fit_w = full[f"model:{w}"]
        screened[w] = (recover(mg, answered.trials, n_sims=min(screen, sims), seed=seed, around=fit_w.p,
                               spec=fit_w.spec, n_jobs=n_jobs) if sims else None)
    table = []
    for w in candidates:
        fit_w = full[f"model:{w}"]
        lp = fit_w.log_probabilities(answered)
        nll = float(-lp[np.arange(n_ans), answered.choice_pos].sum())
        rec_w = screened[w]
        bad = ([n for n, row in rec_w["params"].items() if not row["identifiable"]]
               if rec_w is not None else None)
        table.append({"weights": w, "loglik": cv_all[f"model:{w}"]["pooled"]["loglik"]["value"],
                      "aic": information_criteria(nll, fit_w.n_params, n_ans)["aic"],
                      "n_params": fit_w.n_params, "unidentifiable": bad,
                      "min_r": (min(row["r"] if np.isfinite(row["r"]) else -1.0
                                    for row in rec_w["params"].values()) if rec_w is not None else None),
                      "screen_sims": rec_w["n_sims"] if rec_w is not None else 0})
    chosen, reason = choose_grouping(table, forced=weights != "auto")
    grouping = {"chosen": chosen, "forced": weights != "auto", "reason": reason,
                "rule": GROUPING_RULE, "candidates": table}

    model = full[f"model:{chosen}"]
    cen_pred = EigenModel(centrality_spec(mg, chosen), restarts=r, seed=seed + 2)
    nested = [fit.nested for fit in [model, *fold_fits[f"model:{chosen}"]]]
    if r == 1 and all(fit is not None for fit in nested):
        # With one restart the centrality rival's fit (centre start, no screen)
        # is exactly the nested beta = 0 fit behind the chosen model's nested
        # start, on the same training trials: reuse it instead of refitting.
        full["centrality"] = _adopt(cen_pred, nested[0])
        cv_all["centrality"], cv_all["_lp"]["centrality"] = score_fitted(
            [_adopt(cen_pred, fit) for fit in nested[1:]], design, k, seed)
    else:
        cen = cross_validate({"centrality": cen_pred}, design, k, seed, n_jobs=n_jobs, in_sample=True)
        full["centrality"] = cen.pop("_fitted")["centrality"]
        cv_all["_lp"]["centrality"] = cen["_lp"]["centrality"]
        cv_all["centrality"] = cen["centrality"]
    order = ["model", *[n for n in rivals if n != "model"]]
    cv_all["model"] = cv_all[f"model:{chosen}"]
    cv_all["_lp"]["model"] = cv_all["_lp"][f"model:{chosen}"]
    for w in candidates:
        cv_all.pop(f"model:{w}")
        cv_all["_lp"].pop(f"model:{w}")
    full["model"] = model
    in_sample = {}
    for name in order:
        pred = full[name]
        lp = pred.log_probabilities(answered)
        nll = float(-lp[np.arange(n_ans), answered.choice_pos].sum())
        in_sample[name] = information_criteria(nll, pred.n_params, n_ans)
    theta, beta, tau = model.unpacked()
    params = {"theta": model.spec.theta_dict(theta), "beta": beta, "tau": tau,
              "theta_groups": model.spec.group_dict(model.p), "weights": model.spec.weights,
              "reference_pair": _ref_name(model.spec), "beta_relative_to_lambda1": model.spec.beta_relative,
              "activation": "unit-norm eigenvector; scores ln(a_k + eps mean a) over the options",
              "cue_weights": dict(cue_kind_weights(mg)),
              "rivals": {n: full[n].params() for n in order if n != "model"}}
    recovery = None
    if sims:
        rec = screened[chosen]
        if rec["n_sims"] < sims:  # the chosen grouping's screening recovery, extended to the full count
            rec = recover(mg, answered.trials, n_sims=sims, seed=seed, around=model.p, spec=model.spec,
                          n_jobs=n_jobs, reuse=rec)
        recovery = recovery_summary(rec)
        params["identifiable"] = {n: row["identifiable"] for n, row in recovery["params"].items()}
        bad = [n for n, ok in params["identifiable"].items() if not ok]
        if bad:
            notes.append("not identifiable at this participant's design (recovery r < "
                         f"{recovery['threshold']}): {', '.join(bad)}")
    if not grouping["forced"]:
        notes.append(f"weight grouping {chosen!r} chosen: {reason}")
    t_rec = time.perf_counter() - t0 - t_full
    fold_sizes = cv_all.pop("_folds")
    lps, held = cv_all.pop("_lp"), cv_all.pop("_rows")
    lps = {n: lps[n] for n in order}
    paired = paired_differences(lps, design, held, seed=seed)
    if len(fold_sizes) < k:
        notes.append(f"only {len(fold_sizes)} days with answers: {len(fold_sizes)} folds instead of {k}")
    if design.missing_options:
        notes.append(f"{design.missing_options} option places are not in the graph (activation 0)")
    no_cue = int((design.cue_w.sum(axis=1) == 0).sum())
    if no_cue:
        notes.append(f"{no_cue} trials have no cue node in the graph (centrality only)")
    n_comp, labels = connected_components(mg.capped, directed=False)
    if n_comp > 1:
        sizes = np.bincount(labels)
        notes.append(f"the capped graph has {n_comp} connected components (largest {sizes.max()} of "
                     f"{mg.n} nodes); the activation can jump between components as beta changes, "
                     f"so the likelihood is only piecewise smooth")
    if episodes is None:
        notes.append("no episodes given: frequency from the graph's counts; most-visited and ACT-R left out")

    rows = np.flatnonzero(design.answered)
    ans = design.answered
    pa = (design.choice_pos[ans] == design.correct_pos[ans]).sum()
    from .crossval import proportion

    return FitResult(
        params=params,
        cv=cv_all["model"],
        baselines={name: cv_all[name] for name in order if name != "model"},
        n_trials=len(design), n_answered=n_ans, n_skipped=len(design) - n_ans,
        paired=paired, in_sample=in_sample, recovery=recovery, grouping=grouping,
        fit={"nll": model.nll, "n_params": model.n_params, "restarts": r, "runs": model.runs,
             "converged": model.converged, "folds": len(fold_sizes), "fold_sizes": fold_sizes,
             "seconds_fits": round(t_full, 3), "seconds_recovery": round(t_rec, 3),
             "seconds_total": round(time.perf_counter() - t0, 3),
             "n_nodes": mg.n, "components": int(n_comp), "type_pairs": [f"{a}|{b}" for a, b in mg.type_pairs]},
        chance_level=chance_metrics(design, rows),
        participant_accuracy=proportion(pa, n_ans),
        notes=notes,
    )


def _ref_name(spec):
    return spec.reference


def _fmt_prop(m) -> str:
    v, ci = m.get("value"), m.get("ci") or [None, None]
    if v is None:
        return "-"
    lo, hi = ci
    return f"{v:5.3f} [{lo:4.2f}, {hi:4.2f}]" if lo is not None else f"{v:5.3f}"


def _fmt_ll(m) -> str:
    v, ci = m.get("value"), m.get("ci") or [None, None]
    if v is None:
        return "-"
    lo, hi = ci
    return f"{v:6.3f} [{lo:5.2f}, {hi:5.2f}]" if lo is not None else f"{v:6.3f}"


def _fmt_diff(m) -> str:
    v, ci = m.get("value"), m.get("ci") or [None, None]
    if v is None:
        return "-"
    return f"{v:+6.3f} [{ci[0]:+5.2f}, {ci[1]:+5.2f}]"


def _fmt_rec(r) -> str:
    if not r:
        return ""
    mark = "identifiable" if r.get("identifiable") else "NOT identifiable"
    return (f"   (recovery r {r['r']:.2f}, bias {r['bias']:+.2f}, RMSE {r['rmse']:.2f}: {mark})"
            if r.get("r") is not None else f"   (recovery: {mark})")


def _grouping_lines(g: dict) -> list[str]:
    """The weight-grouping choice: every candidate's held-out fit and screening recovery."""
    if not g:
        return []
    head = (f"weight grouping: {g['chosen']} ({'asked for' if g.get('forced') else 'chosen'}: "
            f"{g.get('reason', '')})")
    rows = g.get("candidates") or []
    if len(rows) < 2:
        return ["", head]
    sims = max((r.get("screen_sims") or 0) for r in rows)
    lines = ["", head,
             f"{'grouping':<12} {'free':>4} {'held-out loglik':>16} {'AIC':>8} {'min recovery r':>15}  "
             f"not identifiable (screening, {sims} simulations around each fit)"]
    for r in rows:
        ll = r.get("loglik")
        mr = r.get("min_r")
        bad = r.get("unidentifiable")
        mark = " <- chosen" if r["weights"] == g["chosen"] else ""
        lines.append(f"{r['weights']:<12} {r['n_params']:>4} "
                     f"{(f'{ll:.3f}' if ll is not None else '-'):>16} {r['aic']:8.1f} "
                     f"{(f'{mr:.2f}' if mr is not None else '-'):>15}  "
                     f"{'-' if bad is None else (', '.join(bad) or 'none')}{mark}")
    return lines


def render_table(d: dict) -> str:
    """Plain-text table: model vs each baseline, held-out, with 95 % intervals."""
    p = d["params"]
    lines = [f"memory model fit: {d['n_answered']} answered trials ({d['n_skipped']} skipped), "
             f"{d['fit'].get('folds')}-fold cross-validation by day",
             "",
             f"{'predictor':<33} {'agreement [95% CI]':<22} {'accuracy [95% CI]':<22} "
             f"{'held-out loglik [95% CI]':<24}"]
    rows = [("model", d["cv"])] + list(d["baselines"].items())
    for name, res in rows:
        pooled = res["pooled"]
        lines.append(f"{LABELS.get(name, name):<33} {_fmt_prop(pooled['agreement']):<22} "
                     f"{_fmt_prop(pooled['accuracy']):<22} {_fmt_ll(pooled['loglik']):<24}")
    cl = d.get("chance_level", {})
    if cl:
        lines.append(f"{'(chance level)':<33} {cl['agreement']:5.3f}{'':<17} {cl['agreement']:5.3f}"
                     f"{'':<17} {cl['loglik']:6.3f}")
    pa = d.get("participant_accuracy")
    if pa:
        lines.append(f"{'(participant accuracy)':<33} {'':<22} {_fmt_prop(pa):<22}")
    paired = d.get("paired") or {}
    if paired:
        lines += ["", "model minus rival, same held-out trials, 95% day-bootstrap interval "
                      "(positive favours the model); in-sample AIC and BIC:",
                  f"{'rival':<33} {'loglik per trial':<24} {'agreement':<24} {'accuracy':<24} "
                  f"{'AIC':>8} {'BIC':>8}"]
        ins = d.get("in_sample") or {}
        for name, diff in paired.items():
            crit = ins.get(name) or {}
            lines.append(f"{LABELS.get(name, name):<33} {_fmt_diff(diff['loglik']):<24} "
                         f"{_fmt_diff(diff['agreement']):<24} {_fmt_diff(diff['accuracy']):<24} "
                         f"{crit.get('aic', float('nan')):8.1f} {crit.get('bic', float('nan')):8.1f}")
        crit = ins.get("model") or {}
        if crit:
            lines.append(f"{LABELS['model']:<33} {'':<24} {'':<24} {'':<24} "
                         f"{crit['aic']:8.1f} {crit['bic']:8.1f}")
    lines += _grouping_lines(d.get("grouping") or {})
    lines += ["", "parameters (fitted on all answered trials; "
                  f"{p.get('reference_pair')} fixed to 1; beta relative to lambda_1 of W):"]
    groups = p.get("theta_groups") or {k: v for k, v in p["theta"].items()}
    rec = (d.get("recovery") or {}).get("params", {})
    for key, val in groups.items():
        lines.append(f"  theta[{key}] = {val:.4g}" + _fmt_rec(rec.get(f"theta[{key}]")))
    lines.append(f"  beta = {p['beta']:.4g}" + _fmt_rec(rec.get("beta")))
    lines.append(f"  tau = {p['tau']:.4g}" + _fmt_rec(rec.get("tau")))
    for note in d.get("notes", []):
        lines.append(f"note: {note}")
    return "\n".join(lines)


def load_home_inputs(home):
    """Trials joined with answers, and episodes, from the home's vault."""
    from ..vault import Vault
    from .design import join_answers

    v = Vault.open(home)
    try:
        trials = [obj for _, obj in v.items("trials")]
        answers = {rid: obj for rid, obj in v.items("answers")}
        episodes = [obj for _, obj in v.items("episodes")]
    finally:
        close = getattr(v, "close", None)
        if close:
            close()
    return join_answers(trials, answers), episodes


MIN_FIT_ANSWERS = 12
"""Answered trials a participant's fit needs (see :func:`check_enough_answers`)."""
MIN_FIT_DAYS = 3
"""Distinct trial days a participant's fit needs: cross-validation folds are whole days."""


def check_enough_answers(rows, *, source: str = "fit") -> None:
    """Refuse a participant's fit on too few answers (:class:`StateError`, exit 5).

    Below ``MIN_FIT_ANSWERS`` answered trials on ``MIN_FIT_DAYS`` distinct days
    a fit only shows noise: on a handful of four-option choices the day folds
    hold one or two trials each and the recovery check has nothing to recover.
    Twelve is about what one quiz session leaves (20 questions, a few "not
    sure").  The thresholds are a practical floor (common practice, no
    source), not a power analysis; ``lethe study plan`` sizes a study.
    :func:`fit_model` itself does not refuse (tests and simulations call it on
    small designs on purpose).
    """
    answered = [r for r in rows if r.get("choice") is not None]
    days = {str(r.get("date", "")) for r in answered}
    if len(answered) < MIN_FIT_ANSWERS or len(days) < MIN_FIT_DAYS:
        raise StateError(
            f"{source}: {len(answered)} answered memory-test question(s) on {len(days)} day(s) so far; "
            f"the model is fitted once there are at least {MIN_FIT_ANSWERS} answers on "
            f"{MIN_FIT_DAYS} different days (answer more with 'lethe quiz' or on your page)")


def fit_from_home(home, policy=None, seed: int = 0, *, store: bool = True,
                  weights: str = "auto") -> FitResult:
    """Fit from the home's vault (trials, answers, episodes) and store ``fits/latest``."""
    from ..graph import CooccurrenceGraph
    from ..home import Home

    home = home if isinstance(home, Home) else Home(home)
    if policy is None:
        policy = home.load_policy()
    rows, episodes = load_home_inputs(home)
    if not rows:
        raise DataError(f"{home.vault_path}: no quiz trials stored yet; run the quiz first")
    if not episodes:
        raise DataError(f"{home.vault_path}: no episodes stored; the graph cannot be built")
    check_enough_answers(rows, source=str(home.vault_path))
    graph = CooccurrenceGraph.from_episodes(episodes, policy)
    result = fit_model(graph, rows, policy, seed=seed, episodes=episodes, weights=weights)
    if store:
        from ..vault import Vault

        v = Vault.open(home)
        try:
            v.upsert("fits", "latest", result.to_dict())
        finally:
            close = getattr(v, "close", None)
            if close:
                close()
    return result
