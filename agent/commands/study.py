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
    cd.add_argument("--server-url", metavar="URL",
                    help="the study server agents upload to (https://HOST:PORT); the card then names it")
    cd.add_argument("--server-cert", metavar="PEM",
                    help="the server's certificate, whose SHA-256 agents pin (default: the --self-signed one "
                         "in STUDYDIR/server/tls/cert.pem)")
    add_json(cd)
    cd.set_defaults(func=_card)

    en = with_dir(ps.add_parser("enroll", help="verify and register a device's enrolment file"))
    en.add_argument("file", nargs="+", help="enrolment file(s)")
    add_json(en)
    en.set_defaults(func=_enroll)

    op = with_pass(with_dir(ps.add_parser("open", help="verify, decrypt and store bundles")))
    op.add_argument("bundle", nargs="+", help="bundle files, or folders holding them")
    add_json(op)
    op.set_defaults(func=_open)

    mg = with_dir(ps.add_parser("merge", help="write cohort tables (CSV, streamed) with a data dictionary"))
    mg.add_argument("--out", required=True, metavar="DIR")
    mg.add_argument("--database", metavar="URL",
                    help="read from the study server's database (sqlite:///PATH or postgresql://...) instead of "
                         "STUDYDIR/received")
    add_json(mg)
    mg.set_defaults(func=_merge)

    rp = with_dir(ps.add_parser("report", help="write the cohort HTML report with PNG plots"))
    rp.add_argument("--out", required=True, metavar="DIR")
    add_json(rp)
    rp.set_defaults(func=_report)

    sv = with_pass(with_dir(ps.add_parser(
        "serve", help="run the study server: uploads from agents, the researcher's dashboard (HTTPS)")))
    sv.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    sv.add_argument("--port", type=int, default=8443)
    sv.add_argument("--cert", metavar="PEM", help="the study's TLS certificate")
    sv.add_argument("--key", metavar="PEM", help="its private key")
    sv.add_argument("--self-signed", action="store_true",
                    help="create (or reuse) a self-signed certificate in STUDYDIR/server/tls; put its pin on the "
                         "card with 'lethe study card --server-url'")
    sv.add_argument("--database", metavar="URL",
                    help="sqlite:///PATH or postgresql://USER@HOST/DB (default: SQLite in STUDYDIR/server)")
    sv.add_argument("--dashboard-password-file", metavar="F",
                    help="file holding the researcher's dashboard password (else $LETHE_DASHBOARD_PASSWORD); "
                         "required: the dashboard is never served without one")
    sv.add_argument("--max-bundle-bytes", type=int, default=8 * 1024 * 1024)
    sv.add_argument("--rate-per-minute", type=float, default=30.0, help="uploads per device per minute")
    sv.add_argument("--overdue-days", type=float, default=8.0,
                    help="a participant without a bundle for this long is listed as overdue")
    sv.set_defaults(func=_serve)

    iv = with_dir(ps.add_parser("invite", help="issue one-time invitation codes for enrolment on the server"))
    iv.add_argument("--count", type=int, default=1)
    iv.add_argument("--note", default="", help="a note kept with the codes (never shown to participants)")
    iv.add_argument("--database", metavar="URL", help="as for 'serve'")
    add_json(iv)
    iv.set_defaults(func=_invite)

    an = with_dir(ps.add_parser("analyse", help="cohort results: model against each rival, bootstrap on Dask"))
    an.add_argument("--database", metavar="URL", help="read from the study server's database")
    an.add_argument("--scheduler", metavar="tcp://HOST:8786", help="an existing Dask scheduler (default: a "
                    "LocalCluster on this machine)")
    an.add_argument("--workers", type=int, default=2, help="LocalCluster worker processes (default 2)")
    an.add_argument("--boot", type=int, default=2000, help="bootstrap resamples (default 2000)")
    an.add_argument("--seed", type=int, default=0)
    an.add_argument("--out", metavar="FILE", help="also write the results as JSON")
    add_json(an)
    an.set_defaults(func=_analyse)

    pl = ps.add_parser("plan", help="study planning: power by simulating and fitting synthetic participants "
                                    "on Dask")
    pl.add_argument("--participants", type=int, nargs="+", default=[20, 40, 80], metavar="N")
    pl.add_argument("--trials", type=int, nargs="+", default=[40, 80], metavar="M",
                    help="answered memory-test trials per participant")
    pl.add_argument("--beta", type=float, default=1.0, help="mean cue strength of the synthetic participants")
    pl.add_argument("--beta-sd", type=float, default=0.5, help="its spread across participants")
    pl.add_argument("--gamma", type=float, default=0.5, help="how much choices follow familiarity (the rival)")
    pl.add_argument("--studies", type=int, default=200, help="simulated studies per design (default 200)")
    pl.add_argument("--alpha", type=float, default=0.05)
    pl.add_argument("--power", type=float, default=0.8, help="target power (default 0.8)")
    pl.add_argument("--seed", type=int, default=0)
    pl.add_argument("--scheduler", metavar="tcp://HOST:8786")
    pl.add_argument("--workers", type=int, default=2)
    add_json(pl)
    pl.set_defaults(func=_plan)

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
    from pathlib import Path

    from ..errors import UsageError
    from ..study.card import load_card, write_card
    from ..study.server.tls import cert_pin, tls_dir

    pin = None
    if args.server_url:
        cert = Path(args.server_cert) if args.server_cert else tls_dir(args.dir) / "cert.pem"
        if not cert.exists():
            raise UsageError(f"{cert}: no server certificate; give --server-cert, or run 'lethe study serve "
                             f"--self-signed' once to create one")
        pin = cert_pin(cert.read_bytes())
    elif args.server_cert:
        raise UsageError("--server-cert needs --server-url")
    path = write_card(args.dir, args.policy, args.contact, args.out, server_url=args.server_url, server_pin=pin)
    card = load_card(path)
    emit(args, {"card": str(path), **card.as_dict()},
         f"study card written to {path}\n  study {card.study_id}, key {card.key_fingerprint}\n"
         f"  approved policies: {', '.join(card.approved_policies)}"
         + (f"\n  server {card.server_url}, certificate pin {card.server_pin}" if card.server_url else ""))
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
    from ..study.cohort.merge import merge

    tables = merge(_source(args), args.out)
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


def _dashboard_password(path) -> str:
    import os
    from pathlib import Path

    from ..errors import UsageError

    text = Path(path).read_text("utf-8").strip() if path else os.environ.get("LETHE_DASHBOARD_PASSWORD", "")
    if len(text) < 8:
        raise UsageError("serve: a dashboard password of at least 8 characters is required "
                         "(--dashboard-password-file F or $LETHE_DASHBOARD_PASSWORD); the dashboard is never open")
    return text


def _serve(args) -> int:
    from ..study.keys import read_passphrase
    from ..study.server.app import ServerSettings
    from ..study.server.run import serve

    settings = ServerSettings(_dashboard_password(args.dashboard_password_file),
                              max_bundle_bytes=args.max_bundle_bytes, rate_per_minute=args.rate_per_minute,
                              overdue_days=args.overdue_days)

    def ready(url, pin):
        print(f"lethe study server for {args.dir} at {url}\n  dashboard: {url}/dashboard\n"
              f"  certificate pin (SHA-256): {pin}", flush=True)

    serve(args.dir, read_passphrase(args.passphrase_file), settings, host=args.host, port=args.port,
          certfile=args.cert, keyfile=args.key, self_signed=args.self_signed, database=args.database, ready=ready)
    return 0


def _invite(args) -> int:
    from ..study.keys import load_public
    from ..study.server.store import Store, default_url

    store = Store(args.database or default_url(args.dir), load_public(args.dir)["study_id"])
    codes = store.invite(args.count, args.note)
    emit(args, {"invitations": codes},
         "one-time invitation codes (shown once; only their hashes are kept):\n" + "\n".join(codes))
    return 0


def _progress(what):
    import sys

    def show(done, total):
        if sys.stderr.isatty() or done == total:
            sys.stderr.write(f"\r{what}: {done}/{total} tasks done" + ("\n" if done == total else ""))
            sys.stderr.flush()
    return show


def _source(args):
    if not getattr(args, "database", None):
        return args.dir
    from ..study.keys import load_public
    from ..study.server.store import Store

    return Store(args.database, load_public(args.dir)["study_id"])


def _analyse(args) -> int:
    import json
    from pathlib import Path

    from ..study.cohort.analyse import analyse, analyse_text

    res = analyse(_source(args), scheduler=args.scheduler, n_workers=args.workers, n_boot=args.boot,
                  seed=args.seed, progress=_progress("bootstrap"))
    if args.out:
        Path(args.out).write_text(json.dumps(res, indent=1, sort_keys=True) + "\n", "utf-8")
    emit(args, res, analyse_text(res))
    return 0


def _plan(args) -> int:
    from ..study.cohort.plan import PlanModel, plan, plan_text

    res = plan(args.participants, args.trials, model=PlanModel(args.beta, args.beta_sd, args.gamma),
               n_studies=args.studies, alpha=args.alpha, target_power=args.power, seed=args.seed,
               scheduler=args.scheduler, n_workers=args.workers, progress=_progress("simulated fits"))
    emit(args, res, plan_text(res))
    return 0
