"""``lethe audit``: the ethics board's commands (policy review, diff, ledger verification, report)."""

from __future__ import annotations

from ._common import add_json, emit


def register(sub) -> None:
    p = sub.add_parser("audit", help="ethics board: review a policy, verify a ledger, write a report")
    ps = p.add_subparsers(dest="audit_command", metavar="ACTION", required=True)

    pol = ps.add_parser("policy", help="plain-language review of a policy, optionally against board limits")
    pol.add_argument("file", help="policy TOML file")
    pol.add_argument("--limits", metavar="LIMITS", help="board limits TOML file (see docs/audit.md)")
    add_json(pol)
    pol.set_defaults(func=_policy)

    diff = ps.add_parser("diff", help="what changed between two policy versions, in plain words")
    diff.add_argument("old", help="the earlier policy file")
    diff.add_argument("new", help="the later policy file")
    add_json(diff)
    diff.set_defaults(func=_diff)

    ver = ps.add_parser("verify", help="verify a home's ledger: chain, signatures, destruction, retention")
    ver.add_argument("--home", dest="audit_home", metavar="DIR",
                     help="the home (or a copy of it) to verify; no passphrase is needed")
    ver.add_argument("--enrolment", metavar="FILE",
                     help="the device's enrolment file as the study holds it: its device key and log origin are "
                          "used instead of the home's own copies")
    ver.add_argument("--policy", dest="audit_policy", metavar="FILE",
                     help="the approved policy (the study's copy) instead of the home's policy.toml")
    add_json(ver)
    ver.set_defaults(func=_verify)

    rep = ps.add_parser("report", help="write an HTML compliance report with PNG plots")
    rep.add_argument("--out", required=True, metavar="DIR", help="directory to write index.html and plots into")
    rep.add_argument("--home", dest="audit_home", metavar="DIR", help="the home (or a copy) to report on")
    rep.add_argument("--from-bundles", metavar="STUDYDIR",
                     help="build a cohort view from the ledger digests in a study directory's opened bundles")
    rep.add_argument("--policy", action="append", default=[], metavar="FILE",
                     help="with --from-bundles: a policy whose limit applies to its fingerprint (repeatable)")
    add_json(rep)
    rep.set_defaults(func=_report)


def _home(args):
    from ..home import Home

    return Home(getattr(args, "audit_home", None) or getattr(args, "home", None))


def _policy(args) -> int:
    from ..errors import EXIT_FAILURE
    from ..policy import load_policy
    from ..policy_summary import summarise

    policy = load_policy(args.file)
    summary = summarise(policy)
    out = {"summary": summary.as_dict(), "limits": None}
    text = summary.text()
    rc = 0
    if args.limits:
        from ..audit.limits import check_limits, load_limits

        report = check_limits(policy, load_limits(args.limits))
        out["limits"] = report.as_dict()
        text += "\n" + report.text()
        rc = 0 if report.ok else EXIT_FAILURE
    emit(args, out, text)
    return rc


def _diff(args) -> int:
    from ..audit.diff import diff_policies
    from ..policy import load_policy

    d = diff_policies(load_policy(args.old), load_policy(args.new))
    emit(args, d.as_dict(), d.text())
    return 0


def _verify(args) -> int:
    from ..audit.verify import verify_home

    result = verify_home(_home(args), policy=args.audit_policy, enrolment=args.enrolment)
    emit(args, result.as_dict(), result.text())
    return result.exit_code


def _report(args) -> int:
    from pathlib import Path

    if args.from_bundles:
        from ..audit.cohort import write_cohort_report

        path = write_cohort_report(Path(args.from_bundles), Path(args.out), policies=args.policy)
        what = "Cohort report"
    else:
        from ..audit.report import write_report

        path = write_report(_home(args), Path(args.out))
        what = "Report"
    import json

    figures = json.loads((path.parent / "report.json").read_text("utf-8"))
    verdict = figures.get("verdict") or ("PASSED" if figures.get("ok") else "FAILED")
    emit(args, {"report": str(path), "ok": figures.get("ok")}, f"{what} written to {path}\n{verdict}")
    # The exit code follows the verdict, as for 'lethe audit verify' (docs/cli.md).
    if "exit_code" in figures:
        return int(figures["exit_code"])
    from ..errors import EXIT_FAILURE

    return 0 if figures.get("ok") else EXIT_FAILURE
