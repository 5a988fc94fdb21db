"""``lethe study``: the researcher's side (keys, cards, enrolment, open, merge, report)."""

from __future__ import annotations

from ._common import add_json, emit


def register(sub) -> None:
    p = sub.add_parser("study", help="researcher side: study keys, cards, enrolment, open, merge, report")
    ps = p.add_subparsers(dest="study_command", metavar="ACTION", required=True)

    def with_dir(q):
        q.add_argument("--dir", required=True, metavar="STUDYDIR", help="the study directory")
        return q

    def with_pass(q):
        q.add_argument("--passphrase-file", metavar="F",
                       help="file holding the study key passphrase (else $LETHE_STUDY_PASSPHRASE, else a prompt)")
        return q

    kg = with_pass(with_dir(ps.add_parser("keygen", help="create the study's HPKE key pair")))
    kg.add_argument("--study-id", required=True)
    kg.add_argument("--suite", choices=("default", "pq"), default="default",
                    help="default: DHKEM(X25519)/HKDF-SHA256/AES-128-GCM; pq: hybrid ML-KEM-768 + X25519")
    kg.add_argument("--policy", nargs="*", default=[], metavar="P",
                    help="also write the study card approving these policy files")
    kg.add_argument("--contact", help="contact line for the card (default: the policy's)")
    kg.add_argument("--out", metavar="CARD", help="where to write the card (default STUDYDIR/card.json)")
    add_json(kg)
    kg.set_defaults(func=_keygen)

    cd = with_dir(ps.add_parser("card", help="write the study card participants receive"))
    cd.add_argument("--policy", nargs="+", required=True, metavar="P", help="approved policy files")
    cd.add_argument("--contact", help="contact line (default: the first policy's)")
    cd.add_argument("--out", metavar="CARD", help="output file (default STUDYDIR/card.json)")
    add_json(cd)
    cd.set_defaults(func=_card)

    en = with_dir(ps.add_parser("enroll", help="verify and register a device's enrolment file"))
    en.add_argument("file", nargs="+", help="enrolment file(s)")
    add_json(en)
    en.set_defaults(func=_enroll)

    op = with_pass(with_dir(ps.add_parser("open", help="verify, decrypt and store bundles")))
    op.add_argument("bundle", nargs="+", help="bundle file(s)")
    add_json(op)
    op.set_defaults(func=_open)

    mg = with_dir(ps.add_parser("merge", help="write cohort tables (CSV; Parquet with pyarrow)"))
    mg.add_argument("--out", required=True, metavar="DIR")
    add_json(mg)
    mg.set_defaults(func=_merge)

    rp = with_dir(ps.add_parser("report", help="write the cohort HTML report with PNG plots"))
    rp.add_argument("--out", required=True, metavar="DIR")
    add_json(rp)
    rp.set_defaults(func=_report)

    vw = with_dir(ps.add_parser("verify-withdrawal", help="check a withdrawal certificate and record the withdrawal"))
    vw.add_argument("file")
    add_json(vw)
    vw.set_defaults(func=_verify_withdrawal)


def _keygen(args) -> int:
    from ..study.card import write_card
    from ..study.keys import read_passphrase, study_keygen

    passphrase = read_passphrase(args.passphrase_file, confirm=True)
    pair = study_keygen(args.dir, args.study_id, passphrase, suite=args.suite)
    out = {"study_id": pair.study_id, "suite": pair.suite, "key_fingerprint": pair.fingerprint}
    text = f"study key for {pair.study_id} ({pair.suite} suite), fingerprint {pair.fingerprint}"
    if args.policy:
        card = write_card(args.dir, args.policy, args.contact, args.out)
        out["card"] = str(card)
        text += f"\nstudy card written to {card}"
    emit(args, out, text)
    return 0


def _card(args) -> int:
    from ..study.card import load_card, write_card

    path = write_card(args.dir, args.policy, args.contact, args.out)
    card = load_card(path)
    emit(args, {"card": str(path), **card.as_dict()},
         f"study card written to {path}\n  study {card.study_id}, key {card.key_fingerprint}\n"
         f"  approved policies: {', '.join(card.approved_policies)}")
    return 0


def _enroll(args) -> int:
    from ..study.registry import enroll

    done = []
    for f in args.file:
        dev = enroll(args.dir, f)
        done.append({"file": f, "pseudonym": dev.pseudonym, "device_key_id": dev.device_key_id,
                     "policy_fingerprint": dev.policy_fingerprint})
    emit(args, done, "\n".join(f"enrolled {d['pseudonym']} (device {d['device_key_id']})" for d in done))
    return 0


def _open(args) -> int:
    import sys

    from ..study.keys import read_passphrase
    from ..study.open import open_bundles

    results = open_bundles(args.dir, args.bundle, read_passphrase(args.passphrase_file), strict=False)
    lines = []
    for r in results:
        if r.ok:
            lines.append(f"{r.path}: ok, {r.pseudonym} #{r.seq} -> {r.stored}")
        else:
            print(f"lethe: error: {r.error}", file=sys.stderr)
    emit(args, [r.as_dict() for r in results], "\n".join(lines) or "no bundle opened")
    failed = [r.exit_code for r in results if not r.ok]
    return failed[0] if failed else 0


def _merge(args) -> int:
    from ..study.merge import merge

    tables = merge(args.dir, args.out)
    emit(args, {k: str(v) for k, v in tables.items()},
         "\n".join(f"{k}: {v}" for k, v in tables.items()))
    return 0


def _report(args) -> int:
    from ..study.report import report

    path = report(args.dir, args.out)
    emit(args, {"report": str(path)}, f"report written to {path}")
    return 0


def _verify_withdrawal(args) -> int:
    from ..study.withdrawal import register_withdrawal

    check = register_withdrawal(args.dir, args.file)
    emit(args, {"ok": True, **check.as_dict()},
         f"{args.file}: valid withdrawal of {check.pseudonym} (device {check.device_key_id}) at {check.time}; "
         f"ledger head #{check.ledger_head['seq']}; destroyed "
         + ", ".join(f"{k} {v}" for k, v in check.counts_destroyed.items()))
    return 0
