"""``lethe codebook`` and ``lethe graph``: code features into IDs, build and inspect the graph."""

from __future__ import annotations

from ._common import add_json, emit, home_from


def register(sub) -> None:
    p = sub.add_parser("codebook", help="code stored features into place/sound/motion IDs, refit "
                                         "when due, discard the features and build hourly episodes")
    add_json(p)
    p.set_defaults(func=_codebook)

    g = sub.add_parser("graph", help="sizes, degree histogram, edge counts, routine diagnostics and "
                                      "spectrum of the degree-capped co-occurrence graph")
    add_json(g)
    g.add_argument("--cap-rule", metavar="RULE", default=None,
                   help="try another cap rule than the policy's (strongest, arrival, mutual, bmatching, "
                        "quota, routine)")
    g.add_argument("--degree-cap", metavar="M", type=int, default=None,
                   help="try another degree cap than the policy's")
    g.add_argument("--plot", metavar="FILE", help="write a PNG of the three spectra to FILE")
    g.set_defaults(func=_graph)


def _codebook(args) -> int:
    from ..codebook import run_codebook
    from ..episodes import build_episodes
    from ..vault import Vault

    home = home_from(args).require()
    policy = home.load_policy()
    from ..errors import StateError
    from ..participant.status import agent_running

    if agent_running(home):
        raise StateError(f"{home.root}: the agent is running and codes the features itself every hour; "
                         f"stop it (or 'lethe service remove') to run 'lethe codebook' by hand")
    with home.lock("codebook"), Vault.open(home) as vault:
        report = run_codebook(home, policy, vault)
        n_episodes = len(build_episodes(home, policy, vault))
    d = {**report.to_dict(), "episodes": n_episodes}
    q = d["quality"]
    lines = [f"places: {d['n_places']} ({d['pending_stays']} stays pending confirmation)",
             f"sound classes: {d['n_sounds']}"
             + (f" (silhouette {q['sound']['silhouette']:.2f})" if q.get("sound") and
                q["sound"].get("silhouette") is not None else ""),
             f"motion classes: {d['n_motions']} ({(q.get('motion') or {}).get('method', '-')})",
             "coded now: " + (", ".join(f"{k} {v}" for k, v in sorted(d["coded"].items())) or "nothing"),
             "features discarded: " + (", ".join(f"{k} {v}" for k, v in sorted(d["deleted"].items()))
                                       or "none"),
             f"episodes stored: {d['episodes']}"]
    for e in d["events"]:
        if e["event"] in ("merge", "split"):
            lines.append(f"{e['event']}: " + ", ".join(e.get("ids") or e.get("into") or []))
    emit(args, d, "\n".join(lines))
    return 0


def _graph(args) -> int:
    from ..episodes import load_episodes
    from ..graph import CooccurrenceGraph, graph_summary, routine_diagnostics
    from ..spectrum import plot_spectra, spectrum_report, spectrum_summary
    from ..vault import Vault

    home = home_from(args).require()
    policy = home.load_policy()
    with Vault.open(home) as vault:
        episodes = load_episodes(vault)
        trials = [obj for _, obj in vault.items("trials")]
    try:
        g = CooccurrenceGraph.from_episodes(episodes, policy, cap_rule=args.cap_rule,
                                            degree_cap=args.degree_cap)
    except ValueError as exc:
        from ..errors import UsageError

        raise UsageError(f"lethe graph: {exc}") from None
    summary = graph_summary(g)
    diag = routine_diagnostics(g, trials)
    summary["diagnostics"] = diag
    spec = spectrum_report(g)
    summary["spectrum"] = spectrum_summary(spec)
    if args.plot:
        plot_spectra(spec, args.plot)
        summary["plot"] = str(args.plot)
    s = summary["spectrum"]
    lines = [f"episodes {summary['n_episodes']}, nodes {summary['n_nodes']} ("
             + ", ".join(f"{k} {v}" for k, v in summary["nodes_per_kind"].items()) + ")",
             f"edges: {summary['edges_capped']} capped (cap {summary['degree_cap']}, rule "
             f"{summary['cap_rule']}), {summary['edges_uncapped']} uncapped",
             f"max degree: {summary['max_degree_capped']} capped, {summary['max_degree_uncapped']} uncapped",
             "degree histogram (capped): " + ", ".join(f"{d}:{n}" for d, n in
                                                       summary["degree_histogram"].items()),
             "edges per type pair: " + ", ".join(f"{k} {v}" for k, v in
                                                 summary["edges_per_type_pair"].items())]
    lines.append(f"isolated nodes: {diag['n_isolated']}"
                 + (f" ({', '.join(diag['isolated'])})" if diag["isolated"] else ""))
    lines.append("hours with no place within two links: "
                 + (", ".join(diag["hours_without_place_2"]) or "none"))
    if diag["hour_place_within_2"] is not None:
        lines.append(f"visited (hour, place) pairs within two links: {diag['hour_place_within_2']:.3f} "
                     f"(directly linked {diag['hour_place_linked']:.3f})")
    if diag.get("n_trials"):
        md = diag["trials_mean_distance"]
        lines.append(f"memory-test trials: correct place reachable from the cue in "
                     f"{diag['trials_reachable']:.3f} of {diag['n_trials']}, a neighbour of a cue node in "
                     f"{diag['trials_neighbour']:.3f}, mean distance "
                     + ("-" if md is None else f"{md:.2f}") + " links")
    if "unmet" in g.cap_info:
        lines.append(f"routine requirements the cap rule could not meet: {g.cap_info['unmet']}")
    for name in ("counts", "binary", "capped"):
        r = s[name]
        ratio = "inf" if r["ratio"] is None else f"{r['ratio']:.2f}"
        lines.append(f"spectrum {name:7s}: lambda1 {r['lambda1']:.2f}, lambda1/|lambda2| {ratio}, "
                     f"flatness {r['flatness']:.3f}")
    if args.plot:
        lines.append(f"plot written to {args.plot}")
    emit(args, summary, "\n".join(lines))
    return 0
