"""``lethe policy``: read, check and summarise a policy file."""

from __future__ import annotations

from ._common import add_json, emit


def register(sub) -> None:
    p = sub.add_parser("policy", help="show, check or fingerprint a study policy file")
    ps = p.add_subparsers(dest="policy_command", metavar="ACTION", required=True)

    show = ps.add_parser("show", help="plain-language summary a participant can read")
    show.add_argument("file", help="policy TOML file")
    add_json(show)
    show.set_defaults(func=_show)

    check = ps.add_parser("check", help="validate a policy file; exit 3 with the failing key")
    check.add_argument("file", nargs="+", help="policy TOML file(s)")
    add_json(check)
    check.set_defaults(func=_check)

    ls = ps.add_parser("list", help="the policies shipped with lethe (to start a study from)")
    add_json(ls)
    ls.set_defaults(func=_list)

    wr = ps.add_parser("write", help="write a shipped policy to FILE, to read or edit")
    wr.add_argument("name", help="a name from 'lethe policy list', e.g. default")
    wr.add_argument("out", metavar="FILE", help="where to write it")
    wr.add_argument("--force", action="store_true", help="overwrite FILE if it exists")
    wr.set_defaults(func=_write)

    fp = ps.add_parser("fingerprint", help="print the policy's SHA-256 fingerprint")
    fp.add_argument("file")
    fp.set_defaults(func=_fingerprint)


def _show(args) -> int:
    from ..policy import load_policy
    from ..policy_summary import summarise

    policy = load_policy(args.file)
    summary = summarise(policy)
    emit(args, summary.as_dict(), summary.text())
    return 0


def _check(args) -> int:
    from ..errors import EXIT_DATA, PolicyError
    from ..policy import load_policy

    results, rc = [], 0
    for f in args.file:
        try:
            p = load_policy(f)
            results.append({"file": f, "ok": True, "fingerprint": p.fingerprint})
        except PolicyError as e:
            results.append({"file": f, "ok": False, "key": e.key, "error": str(e)})
            rc = EXIT_DATA
    lines = [f"{r['file']}: ok, fingerprint {r['fingerprint']}" if r["ok"] else f"{r['error']}"
             for r in results]
    emit(args, results, "\n".join(lines))
    return rc


def _fingerprint(args) -> int:
    from ..policy import load_policy

    print(load_policy(args.file).fingerprint)
    return 0


def _list(args) -> int:
    from ..policy_files import describe, shipped

    rows = [{"name": n, "describes": describe(p)} for n, p in shipped().items()]
    emit(args, rows, "\n".join(f"{r['name']:22s} {r['describes']}" for r in rows)
         + "\n\n'lethe policy write NAME FILE' writes one out to read or edit.")
    return 0


def _write(args) -> int:
    from ..policy_files import write_shipped

    out = write_shipped(args.name, args.out, force=args.force)
    print(f"Wrote {out}.")
    return 0
