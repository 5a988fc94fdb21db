"""Regenerate the figures of ``docs/model.md`` (between its ``model-figures`` markers).

Run: ``python benchmarks/model_figures.py [--write]`` (about 5-15 minutes on 2
cores).  Rerun whenever the model, the cap rules or the demo change; the doc
holds no hand-copied numbers.

1. **Cap rule choice**: the simulated panel (:mod:`agent.model.panel`; habit,
   recency and model participants on a synthetic 28-day routine, 200 trials)
   is fitted under every cap rule at the shipped policy's ``m``; the rule with the
   best mean held-out log-likelihood per trial of the model over the habit and
   recency participants is the shipped default.  Model-type participants are
   shown but not used for the choice (their answers come from the model on
   each rule's own graph, so they would favour no rule in particular but mix
   graph and generator).
2. **Routine diagnostics and spectra** of the 14-day demo graph per rule.
3. **The 14-day demo fit** (seed 7, the shipped policy): the full table with
   paired differences, and the on-device recovery.
4. **Recovery at 200 answered trials** with parameters drawn from the ranges
   (not around the fit) on the demo graph.
"""

from __future__ import annotations

import argparse
import io
import re
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

RULES = ("strongest", "arrival", "mutual", "bmatching", "quota", "routine")


def _shipped():
    from agent.policy import bundled_policy_path, load_policy

    return load_policy(bundled_policy_path("default")).graph


CAP = _shipped().degree_cap  # the shipped policy's degree cap
PANEL = ("habit", "recency", "model")
CHOOSE_BY = ("habit", "recency")
SEEDS = (0,)
START, END = "<!-- model-figures:start -->", "<!-- model-figures:end -->"


def panel_table(out) -> str:
    from agent.model.fit import fit_model
    from agent.model.panel import panel_participant

    ll = {r: {k: [] for k in PANEL} for r in RULES}
    for rule in RULES:
        for kind in PANEL:
            for seed in SEEDS:
                eps, g, rows = panel_participant(kind, seed=10 + seed, cap_rule=rule, degree_cap=CAP)
                f = fit_model(g, rows, None, seed=0, episodes=eps, recovery_sims=0)
                ll[rule][kind].append(f.cv["pooled"]["loglik"]["value"])
        print(f"  panel: {rule} done", file=sys.stderr)
    score = {r: float(np.mean([v for k in CHOOSE_BY for v in ll[r][k]])) for r in RULES}
    best = max(score, key=score.get)
    lines = [f"Held-out log-likelihood per trial of the model (mean of {len(SEEDS)} synthetic participants "
             f"per type, 28 days, 200 trials, 4 uniform options, m = {CAP}; chance = -1.386):", "",
             "| cap rule | " + " | ".join(PANEL) + " | mean of habit and recency |",
             "| --- |" + " --- |" * (len(PANEL) + 1)]
    for r in RULES:
        cells = " | ".join(f"{np.mean(ll[r][k]):.3f}" for k in PANEL)
        mark = " **(best)**" if r == best else ""
        lines.append(f"| {r} | {cells} | {score[r]:.3f}{mark} |")
    out["best"] = best
    return "\n".join(lines)


def demo_home(workdir: Path):
    from agent.demo.run import run_demo

    run_demo(workdir, days=14, seed=7, out=io.StringIO())
    return workdir / "home"


def diagnostics_table(episodes, rows) -> str:
    from agent.graph import CooccurrenceGraph, routine_diagnostics
    from agent.spectrum import spectrum_report

    lines = ["| cap rule | edges | isolated nodes | hours without a place within 2 links | "
             "visited hour-place pairs within 2 links | trials: place a neighbour of a cue node | "
             "capped λ1 | λ1/abs(λ2) | flatness |", "| --- |" + " --- |" * 8]
    for rule in RULES:
        g = CooccurrenceGraph.from_episodes(episodes, degree_cap=CAP, cap_rule=rule)
        d = routine_diagnostics(g, rows)
        s = spectrum_report(g)["capped"]
        ratio = "inf" if not np.isfinite(s["ratio"]) else f"{s['ratio']:.2f}"
        lines.append(f"| {rule} | {g.n_edges} | {d['n_isolated']} | {len(d['hours_without_place_2'])} | "
                     f"{d['hour_place_within_2']:.2f} | {d['trials_neighbour']:.2f} | {s['lambda1']:.2f} | "
                     f"{ratio} | {s['flatness']:.3f} |")
    return "\n".join(lines)


def demo_fit(home, rule) -> tuple[str, object]:
    from agent.graph import CooccurrenceGraph
    from agent.model.fit import fit_model, load_home_inputs

    rows, eps = load_home_inputs(home)
    g = CooccurrenceGraph.from_episodes(eps, degree_cap=CAP, cap_rule=rule)
    t0 = time.perf_counter()
    f = fit_model(g, rows, None, seed=0, episodes=eps, recovery_sims=30)
    sec = time.perf_counter() - t0
    return f.table() + f"\n\n(fit with 5 folds, rivals and 30-simulation recovery: {sec:.1f} s on a shared " \
                       f"2-core machine)", (rows, eps, g)


def recovery_ranges(rows, g) -> str:
    from agent.model.recovery import recover

    answered = [r for r in rows if r.get("choice") is not None][:200]
    rec = recover(g, answered, n_sims=30, seed=0)
    lines = [f"{rec['n_sims']} simulations x {rec['n_trials']} trials, parameters drawn log-uniformly from "
             f"the ranges of `recovery.RANGES` (log scale):", "",
             "| parameter | r | bias | RMSE | identifiable (r >= 0.7) | r >= 0.8 |",
             "| --- | --- | --- | --- | --- | --- |"]
    for name, row in rec["params"].items():
        lines.append(f"| {name} | {row['r']:.2f} | {row['bias']:+.2f} | {row['rmse']:.2f} | "
                     f"{'yes' if row['identifiable'] else 'no'} | {'yes' if row['r'] >= 0.8 else 'no'} |")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--write", action="store_true", help="replace the figures block of docs/model.md")
    ap.add_argument("--skip-panel", action="store_true", help="leave the cap-rule panel out (quick run)")
    args = ap.parse_args(argv)
    parts, info = [], {}
    t0 = time.perf_counter()
    if not args.skip_panel:
        parts += ["### Choosing the cap rule on the simulated panel", "", panel_table(info), ""]
    from agent.model.fit import load_home_inputs

    shipped = _shipped().cap_rule
    rule = info.get("best", shipped)
    with tempfile.TemporaryDirectory() as tmp:
        home = demo_home(Path(tmp) / "demo")
        rows, eps = load_home_inputs(home)
        parts += [f"### The 14-day demo graph under each rule (m = {CAP})", "", diagnostics_table(eps, rows), ""]
        table, (rows, eps, g) = demo_fit(home, rule)
        parts += [f"### The 14-day demo fit (seed 7, cap rule `{rule}`, m = {CAP})", "", "```", table, "```", ""]
        parts += ["### Recovery at the demo's design", "", recovery_ranges(rows, g), ""]
    parts.append(f"_Generated by `benchmarks/model_figures.py` in {time.perf_counter() - t0:.0f} s; "
                 f"shipped cap rule `{shipped}`" + (f", panel's best `{info['best']}`" if info else "") + "._")
    block = "\n".join(parts)
    print(block)
    if args.write:
        doc = Path(__file__).resolve().parent.parent / "docs" / "model.md"
        text = doc.read_text()
        if START not in text or END not in text:
            raise SystemExit(f"{doc}: markers {START} ... {END} not found")
        text = re.sub(re.escape(START) + ".*?" + re.escape(END), lambda m: f"{START}\n{block}\n{END}", text,
                      flags=re.S)
        doc.write_text(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
