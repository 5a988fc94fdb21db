"""``lethe demo``: the whole study, end to end, on a fictional participant."""

from __future__ import annotations

from ._common import add_json, emit


def register(sub) -> None:
    p = sub.add_parser("demo", help="run every stage end to end on a fictional participant",
                       description="Plays the researcher, the participant (with a simulated recorder and "
                                   "simulated memory-test answers) and the ethics board in one work "
                                   "directory, and says in plain words what happened at each stage.")
    p.add_argument("--days", type=int, default=14, help="simulated days of data (default: 14)")
    p.add_argument("--seed", type=int, default=7, help="random seed of the scenario (default: 7)")
    p.add_argument("--workdir", metavar="DIR",
                   help="new or empty directory to work in (default: a fresh temporary directory)")
    p.add_argument("--policy", metavar="FILE", help="study policy (default: policies/default.toml)")
    p.add_argument("--serve", action="store_true",
                   help="keep the demo's study server running at the end, for its dashboard (Ctrl-C stops it)")
    add_json(p)
    p.set_defaults(func=_demo)

    r = sub.add_parser("simulate", help="demo only: a simulated recorder fills an enrolled home's inbox",
                       description="Writes the fictional scenario's raw drops (sound snippets, GPS, "
                                   "accelerometry, mood reports) into HOME/inbox one simulated day at a "
                                   "time, for trying lethe after 'lethe init'. The days end before today "
                                   "and the home's study start moves back to the first of them; a home "
                                   "that already received real data is refused.")
    r.add_argument("--days", type=int, default=14, help="simulated days (default: 14)")
    r.add_argument("--seed", type=int, default=7, help="random seed of the scenario (default: 7)")
    add_json(r)
    r.set_defaults(func=_simulate)


def _demo(args) -> int:
    import io
    import os
    import sys

    from ..demo.run import run_demo

    os.environ.setdefault("MPLBACKEND", "Agg")
    if "NUMBA_CACHE_DIR" not in os.environ:
        # librosa's compiled functions are cached per user so a second demo starts fast
        import platformdirs

        os.environ["NUMBA_CACHE_DIR"] = os.path.join(platformdirs.user_cache_dir("lethe"), "numba")
    out = io.StringIO() if args.json else sys.stdout
    facts = run_demo(args.workdir, days=args.days, seed=args.seed, policy_path=args.policy, out=out,
                     serve=args.serve)
    if args.json:
        emit(args, facts)
    return 0


def _simulate(args) -> int:
    import os
    import sys

    from ..demo.record import record
    from ._common import home_from

    from ._common import progress

    os.environ.setdefault("MPLBACKEND", "Agg")
    quiet = bool(args.json)
    with progress(args.days, "simulated days", unit="day") as bar:
        def say(line: str) -> None:
            if line.startswith("day "):
                bar.update(1)
            if bar.disable and not quiet:
                print(line)
            elif not bar.disable:
                bar.write(line, file=sys.stderr)
        totals = record(home_from(args), days=args.days, seed=args.seed, say=say)
    emit(args, totals, f"Wrote {totals['files']} simulated raw files; the inbox is empty again. "
                       f"Next: 'lethe codebook' to code them into places, sounds and motion, then "
                       f"'lethe status', 'lethe places', 'lethe quiz'.")
    return 0
