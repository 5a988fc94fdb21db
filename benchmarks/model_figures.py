"""Regenerate the figures of ``docs/model.md`` (between its ``model-figures`` markers).

Run: ``python benchmarks/model_figures.py [--write]`` (about 10-20 minutes on
2 shared cores).  Rerun whenever the model, the cap rules or the demo change;
the doc holds no hand-copied numbers.

1. **Cap rule choice** (the procedure of docs/model.md, "Choosing the cap rule"):

   a. *Graph criteria, a hard filter* (issue 11): on the 14-day demo graph and
      on every panel participant's graph, at the shipped policy's degree cap
      ``m``, no isolated node, and every hour with episodes within two links
      of at least one place visited at that hour.  A rule that fails on any of
      these graphs is out.
   b. *Panel* (:mod:`agent.model.panel`): for each surviving rule, habit,
      recency and model participants on synthetic 28-day routines (200 trials,
      4 uniform options), :data:`SEEDS` routines per type; the model is fitted
      as on the device (``weights="auto"``, 5 day folds) but without the
      recovery screening (``recovery_sims=0``: the grouping is then chosen by
      held-out log-likelihood alone), to keep the run bounded.
   c. The rule with the best mean held-out log-likelihood per trial over the
      habit and recency participants (the model participants are shown, not
      used: their answers come from the model on each rule's own graph) is the
      procedure's choice; the seed-to-seed spread (standard deviation over the
      seeds of the per-seed habit-and-recency mean) and the per-seed paired
      difference to the runner-up are printed.
2. **Routine diagnostics and spectra** of the 14-day demo graph per rule.
3. **The 14-day demo fit** (seed 7) under the shipped policy (its cap rule,
   restarts, folds and 30-simulation recovery), the full table with paired
   differences and the grouping choice, and a sentence per rival generated
   from the intervals.
4. **Recovery at 200 answered trials** on the demo's shipped graph, parameters
   drawn from the ranges (not around the fit), 30 simulations, for every
   candidate grouping: the done-when check of issue 11 (r >= 0.8 for beta, tau
   and each grouped weight).
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
PANEL = ("habit", "recency", "model")
CHOOSE_BY = ("habit", "recency")
SEEDS = (0, 1, 2)
RECOVERY_TRIALS = 200
START, END = "<!-- model-figures:start -->", "<!-- model-figures:end -->"


def _shipped_policy():
    from agent.policy import bundled_policy_path, load_policy

    return load_policy(bundled_policy_path("default"))


CAP = _shipped_policy().graph.degree_cap  # the shipped policy's degree cap


# -- 1a. graph criteria ---------------------------------------------------------------------------
def graph_criteria(g) -> dict:
    """Isolated nodes, and hours with episodes none of whose visited places is within two links."""
    from scipy.sparse.csgraph import shortest_path

    deg = np.asarray((g.capped != 0).sum(axis=1)).ravel()
    hours = g.nodes_of("hour")
    places = np.array(g.nodes_of("place"), dtype=np.int64)
    dist = shortest_path((g.capped != 0).astype(float), unweighted=True, directed=False, indices=hours)
    counts = g.counts.tocsr()
    far = []
    for r, h in enumerate(hours):
        visited = [p for p in places.tolist() if counts[h, p] > 0]
        if visited and not (dist[r, visited] <= 2).any():
            far.append(g.nodes[h][1])
    return {"isolated": int((deg == 0).sum()), "hours_far": len(far), "ok": bool((deg == 0).sum() == 0 and not far)}


def criteria_table(demo_eps, out) -> str:
    from agent.graph import CooccurrenceGraph
    from agent.model.synthetic import routine_episodes

    panel_eps = {s: routine_episodes(28, seed=10 + s) for s in SEEDS}
    lines = ["| cap rule | demo: isolated / hours far | " + " | ".join(f"panel seed {s}" for s in SEEDS)
             + " | passes |", "| --- |" + " --- |" * (len(SEEDS) + 2)]
    passing, graphs = [], {}
    for rule in RULES:
        cells, ok = [], True
        g = CooccurrenceGraph.from_episodes(demo_eps, degree_cap=CAP, cap_rule=rule)
        c = graph_criteria(g)
        ok &= c["ok"]
        cells.append(f"{c['isolated']} / {c['hours_far']}")
        for s in SEEDS:
            gp = CooccurrenceGraph.from_episodes(panel_eps[s], degree_cap=CAP, cap_rule=rule)
            graphs[(rule, s)] = gp
            c = graph_criteria(gp)
            ok &= c["ok"]
            cells.append(f"{c['isolated']} / {c['hours_far']}")
        if ok:
            passing.append(rule)
        lines.append(f"| {rule} | " + " | ".join(cells) + f" | {'yes' if ok else 'no'} |")
        print(f"  criteria: {rule} {'passes' if ok else 'fails'}", file=sys.stderr)
    out["passing"], out["panel_graphs"], out["panel_eps"] = passing, graphs, panel_eps
    return "\n".join(lines)


# -- 1b/c. panel ------------------------------------------------------------------------------------
def panel_table(info) -> str:
    from agent.model.fit import fit_model
    from agent.model.panel import simulate_type
    from agent.model.synthetic import quiz_trials

    rules = info["passing"]
    if not rules:
        info["best"] = None
        return "No cap rule passes the graph criteria; the panel was not run."
    ll = {r: {k: {} for k in PANEL} for r in rules}
    for rule in rules:
        for s in SEEDS:
            eps, g = info["panel_eps"][s], info["panel_graphs"][(rule, s)]
            trials = quiz_trials(eps, 200, seed=10 + s + 1)
            for kind in PANEL:
                rows = simulate_type(kind, g, trials, eps, seed=10 + s + 2)
                f = fit_model(g, rows, None, seed=0, episodes=eps, recovery_sims=0)
                ll[rule][kind][s] = f.cv["pooled"]["loglik"]["value"]
        print(f"  panel: {rule} done", file=sys.stderr)
    per_seed = {r: np.array([np.mean([ll[r][k][s] for k in CHOOSE_BY]) for s in SEEDS]) for r in rules}
    score = {r: float(per_seed[r].mean()) for r in rules}
    best = max(score, key=score.get)
    info["best"] = best
    head = (f"Held-out log-likelihood per trial of the model, mean ± SD over {len(SEEDS)} synthetic routines "
            f"(seeds {', '.join(str(10 + s) for s in SEEDS)}) per participant type; 28 days, 200 trials, "
            f"4 uniform options, m = {CAP}, `weights=\"auto\"` without recovery; chance = -1.386.  Only the "
            f"rules that pass the graph criteria are run.")
    lines = [head, "", "| cap rule | " + " | ".join(PANEL) + " | habit and recency (choice) |",
             "| --- |" + " --- |" * (len(PANEL) + 1)]
    for r in rules:
        cells = " | ".join(f"{np.mean(list(ll[r][k].values())):.3f} ± "
                           f"{np.std(list(ll[r][k].values()), ddof=1):.3f}" for k in PANEL)
        mark = " **(best)**" if r == best else ""
        lines.append(f"| {r} | {cells} | {score[r]:.3f} ± {per_seed[r].std(ddof=1):.3f}{mark} |")
    if len(rules) > 1:
        second = sorted(rules, key=score.get)[-2]
        diff = per_seed[best] - per_seed[second]
        lines += ["", f"Per-seed difference `{best}` minus `{second}` (habit and recency mean): "
                      + ", ".join(f"{d:+.3f}" for d in diff)
                      + f"; mean {diff.mean():+.3f}, SD {diff.std(ddof=1):.3f}; "
                      + ("positive on every seed." if (diff > 0).all() else
                         "not the same sign on every seed: the margin is within the seed-to-seed spread.")]
        info["margin"] = diff
    return "\n".join(lines)


# -- 2. diagnostics -----------------------------------------------------------------------------------
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


# -- 3. the demo fit ------------------------------------------------------------------------------------
def paired_sentence(d: dict) -> str:
    from agent.model.fit import LABELS

    parts = {"better": [], "worse": [], "tie": []}
    for name, diff in d["paired"].items():
        v, (lo, hi) = diff["loglik"]["value"], diff["loglik"]["ci"]
        key = "better" if lo > 0 else "worse" if hi < 0 else "tie"
        parts[key].append(f"{LABELS.get(name, name)} ({v:+.3f} [{lo:+.2f}, {hi:+.2f}])")
    out = ["Model minus rival in held-out log-likelihood per trial, 95 % day-bootstrap interval."]
    if parts["better"]:
        out.append("The model predicts the answers **better** than: " + "; ".join(parts["better"]) + ".")
    if parts["tie"]:
        out.append("It cannot be told apart from: " + "; ".join(parts["tie"]) + ".")
    if parts["worse"]:
        out.append("It predicts them **worse** than: " + "; ".join(parts["worse"]) + ".")
    return " ".join(out)


def demo_fit(home, policy) -> tuple[str, object]:
    from agent.graph import CooccurrenceGraph
    from agent.model.fit import fit_model, load_home_inputs

    rows, eps = load_home_inputs(home)
    g = CooccurrenceGraph.from_episodes(eps, policy)
    t0 = time.perf_counter()
    f = fit_model(g, rows, policy, seed=0, episodes=eps)
    sec = time.perf_counter() - t0
    d = f.to_dict()
    text = (f"```\n{f.table()}\n\n(fit with {f.fit['folds']} folds, rivals, the grouping choice and "
            f"{(f.recovery or {}).get('n_sims', 0)}-simulation recovery: {sec:.1f} s on a shared 2-core "
            f"machine)\n```\n\n{paired_sentence(d)}")
    return text, (rows, eps, g, f)


# -- 4. recovery at 200 answered trials -----------------------------------------------------------------
def recovery_ranges(rows, g, chosen) -> str:
    from agent.model.design import as_model_graph
    from agent.model.likelihood import GROUPING_CANDIDATES, ModelSpec
    from agent.model.recovery import recover

    answered = [r for r in rows if r.get("choice") is not None][:RECOVERY_TRIALS]
    mg = as_model_graph(g)
    lines = [f"30 simulations x {len(answered)} answered trials of the demo's design on its shipped graph, "
             f"parameters drawn log-uniformly from the ranges of `recovery.RANGES` (log scale); the "
             f"demo fit chose `{chosen}`:", "",
             "| grouping | parameter | r | bias | RMSE | identifiable (r >= 0.7) | r >= 0.8 (done-when) |",
             "| --- | --- | --- | --- | --- | --- | --- |"]
    verdict = {}
    for w in GROUPING_CANDIDATES:
        rec = recover(mg, answered, n_sims=30, seed=0, spec=ModelSpec.full(mg, weights=w))
        miss = []
        for name, row in rec["params"].items():
            r = row["r"]
            lines.append(f"| {w}{' (chosen)' if w == chosen else ''} | {name} | {r:.2f} | {row['bias']:+.2f} | "
                         f"{row['rmse']:.2f} | {'yes' if row['identifiable'] else 'no'} | "
                         f"{'yes' if r >= 0.8 else '**no**'} |")
            if not r >= 0.8:
                miss.append(name)
        verdict[w] = miss
    miss = verdict.get(chosen, [])
    lines += ["", (f"Done-when check (issue 11: r >= 0.8 for beta, tau and each grouped weight at "
                   f"{len(answered)} answered trials) under the chosen grouping `{chosen}`: "
                   + ("**met**." if not miss else f"**not met** for {', '.join(miss)}."))]
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--write", action="store_true", help="replace the figures block of docs/model.md")
    ap.add_argument("--skip-panel", action="store_true", help="leave the cap-rule panel out (quick run)")
    ap.add_argument("--home", type=Path, help="reuse an existing 14-day seed-7 demo home (quick runs; "
                                               "refused with --write, which always rebuilds the demo)")
    args = ap.parse_args(argv)
    if args.write and args.home:
        ap.error("--home cannot be combined with --write: the written figures rebuild the demo")
    from agent.home import Home
    from agent.model.fit import load_home_inputs

    parts, info = [], {}
    t0 = time.perf_counter()
    policy = _shipped_policy()
    shipped = policy.graph.cap_rule
    with tempfile.TemporaryDirectory() as tmp:
        home = args.home if args.home else demo_home(Path(tmp) / "demo")
        rows, eps = load_home_inputs(home)
        parts += ["### Choosing the cap rule", "",
                  f"**Graph criteria** (a hard filter; isolated nodes / hours with episodes none of whose "
                  f"places is within two links, at m = {CAP}):", "", criteria_table(eps, info), ""]
        if not args.skip_panel:
            parts += ["**Panel** (among the rules that pass):", "", panel_table(info), ""]
        best = info.get("best")
        if best is not None:
            parts.append(f"Procedure's choice: `{best}`; shipped (`policies/default.toml`): `{shipped}`"
                         + (" — the same." if best == shipped else
                            " — **they differ: the shipped default should follow the procedure**.") + "")
            parts.append("")
        parts += [f"### The 14-day demo graph under each rule (m = {CAP})", "", diagnostics_table(eps, rows), ""]
        table, (rows, eps, g, f) = demo_fit(home, Home(home).load_policy())
        parts += [f"### The 14-day demo fit (seed 7, shipped policy: cap rule `{g.cap_rule}`, m = {CAP})", "",
                  table, ""]
        parts += ["### Recovery at the demo's design", "", recovery_ranges(rows, g, f.grouping["chosen"]), ""]
    parts.append(f"_Generated by `benchmarks/model_figures.py` in {time.perf_counter() - t0:.0f} s on "
                 f"{time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}._")
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
