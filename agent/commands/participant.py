"""The participant's commands: init, status, places, quiz, pause, resume, withdraw, service."""

from __future__ import annotations

import re
import sys

from ._common import add_json, emit, home_from


def register(sub) -> None:
    p = sub.add_parser("init", help="enrol this laptop in a study (reads the study card, records consent)")
    p.add_argument("--study", required=True, metavar="CARD", help="the study card JSON from the researcher")
    p.add_argument("--policy", required=True, metavar="FILE", help="the study policy TOML the card approves")
    p.add_argument("--consent", metavar="STUDY_ID",
                   help="agree non-interactively by giving the study id (otherwise you are asked to type it)")
    p.add_argument("--timezone", metavar="ZONE",
                   help="your IANA time zone, e.g. Europe/Lisbon (default: this laptop's zone)")
    p.add_argument("--enrolment-out", metavar="FILE", help="where to write the enrolment file for the researcher")
    p.add_argument("--confirm-fingerprint", metavar="HEX",
                   help="the study key fingerprint as published by the study (needed when the policy does not "
                        "pin the key; otherwise you are asked to type it)")
    p.add_argument("--key-storage", choices=("keyring", "passphrase", "plain"), default=None,
                   help="where the keys are held: the OS keyring (default), a passphrase-wrapped file "
                        "(LETHE_KEY_PASSPHRASE or asked), or plain files (not protected; shown as a warning)")
    add_json(p)
    p.set_defaults(func=_init)

    p = sub.add_parser("status", help="what the agent holds, what is waiting, when the next export is due")
    add_json(p)
    p.set_defaults(func=_status)

    p = sub.add_parser("places", help="list your places; name, merge or exclude them")
    add_json(p)
    g = p.add_mutually_exclusive_group()
    g.add_argument("--name", nargs=2, metavar=("ID", "NAME"), help="give place ID your own name")
    g.add_argument("--merge", nargs=2, metavar=("ID", "INTO"), help="ID is the same place as INTO")
    g.add_argument("--unmerge", metavar="ID", help="undo a merge")
    g.add_argument("--exclude", metavar="ID", help="do not use this place in memory tests")
    g.add_argument("--include", metavar="ID", help="use this place in memory tests again")
    p.set_defaults(func=_places)

    p = sub.add_parser("quiz", help="take the memory test in the terminal, or import answers")
    p.add_argument("--answers", metavar="FILE", help="import answers (JSON or CSV) collected elsewhere")
    p.add_argument("--issue", type=int, metavar="N", help="only issue N new trials (for another front end)")
    p.add_argument("--export-trials", metavar="FILE", help="write the pending trials to FILE (JSON)")
    add_json(p)
    p.set_defaults(func=_quiz)

    p = sub.add_parser("pause", help="pause: arriving files are still destroyed, nothing is kept")
    p.add_argument("--for", dest="duration", metavar="DURATION", help="e.g. 30m, 2h, 1d (default: until resumed)")
    add_json(p)
    p.set_defaults(func=_pause)

    p = sub.add_parser("resume", help="end a pause")
    add_json(p)
    p.set_defaults(func=_resume)

    p = sub.add_parser("withdraw", help="destroy everything and leave a signed withdrawal certificate")
    p.add_argument("--yes", action="store_true", help="do not ask for confirmation")
    add_json(p)
    p.set_defaults(func=_withdraw)

    p = sub.add_parser("open", help="open your own page in the browser (a fresh private link)",
                       description="Open the participant's page: today, your places, the memory test, how you "
                                   "feel, what leaves, pause and withdraw. The running agent serves it; if the "
                                   "agent is not running, this command serves it until you press Ctrl-C.")
    p.add_argument("--page", choices=("today", "places", "test", "feel", "leaves", "pause"), default="today",
                   help="which page to open first")
    p.add_argument("--print-url", action="store_true",
                   help="print the private link instead of starting a browser (it works once, for 2 minutes)")
    p.set_defaults(func=_open)

    p = sub.add_parser("service", help="install or remove the background service")
    ps = p.add_subparsers(dest="service_command", metavar="ACTION", required=True)
    for name, helptext in (("install", "write and enable a per-user service"),
                           ("remove", "disable and remove the per-user service")):
        q = ps.add_parser(name, help=helptext)
        q.add_argument("--dry-run", action="store_true", help="print the file and commands, change nothing")
        q.add_argument("--manager", choices=("systemd", "launchd"), help="override the detected service manager")
        q.set_defaults(func=_service)


# ----------------------------------------------------------------------------- handlers
def _init(args) -> int:
    from ..participant.enrol import consent_text, enrol, laptop_timezone
    from ..policy import load_policy
    from ..study.card import check_policy_approved, load_card

    card = load_card(args.study)
    policy = load_policy(args.policy)
    check_policy_approved(card, policy)
    confirmed = args.confirm_fingerprint
    if not policy.study.key_fingerprint and confirmed is None:
        if not sys.stdin.isatty():
            from ..errors import UsageError

            raise UsageError(f"the policy does not pin the study key: compare the card's key fingerprint "
                             f"{card.key_fingerprint} with the one the study publishes, then pass "
                             f"--confirm-fingerprint HEX")
        print(f"Study key fingerprint on this card:\n  {card.key_fingerprint}\n"
              f"Compare it with the fingerprint the study publishes (its web page, the information sheet).")
        confirmed = input("Type the published fingerprint (at least the first 16 hex digits): ")
    passphrase = None
    if args.key_storage == "passphrase":
        import getpass
        import os

        passphrase = os.environ.get("LETHE_KEY_PASSPHRASE")
        if not passphrase:
            if not sys.stdin.isatty():
                from ..errors import UsageError

                raise UsageError("--key-storage passphrase: set LETHE_KEY_PASSPHRASE or run in a terminal")
            passphrase = getpass.getpass("Passphrase for the keys (asked again whenever lethe starts): ")
    consent = args.consent
    if consent is None:
        if not sys.stdin.isatty():
            from ..errors import UsageError

            raise UsageError("consent must be given: run in a terminal, or pass --consent STUDY_ID")
        print(f"Study {card.study_id}\nContact: {card.contact}\n")
        print(consent_text(card, policy))
        print()
        consent = input(f"To agree, type the study id ({card.study_id}): ")
    zone = args.timezone or laptop_timezone()
    res = enrol(getattr(args, "home", None), args.study, args.policy, consent=consent,
                timezone=zone, enrolment_out=args.enrolment_out, passphrase=passphrase,
                key_storage=args.key_storage, confirm_fingerprint=confirmed)
    if res.get("key_storage") == "plain":
        print("WARNING: the keys are plain files (--key-storage plain): anyone who copies this home can read "
              "the vault and sign as this device.", file=sys.stderr)
    how = "this laptop's zone" if not args.timezone and zone else ("your choice" if args.timezone else
                                                                   "the study's default; --timezone to change")
    emit(args, res, f"You have joined {res['study_id']} as {res['pseudonym']}.\n"
                    f"Times are shown in {res['timezone']} ({how}).\n"
                    f"lethe keeps its files in {res['home']}\n"
                    f"Send this file to the study team: {res['enrolment']}\n"
                    f"Next: 'lethe service install' runs lethe in the background; 'lethe open' shows your page.")
    return 0


def _status(args) -> int:
    from ..participant.status import collect_status, status_text

    st = collect_status(home_from(args))
    emit(args, st, status_text(st))
    return 0


def _places(args) -> int:
    from .. import places
    from ..vault import Vault

    home = home_from(args).require()
    with Vault.open(home) as v:
        if args.name:
            places.set_name(v, args.name[0], args.name[1])
        elif args.merge:
            places.merge(v, args.merge[0], args.merge[1])
        elif args.unmerge:
            places.unmerge(v, args.unmerge)
        elif args.exclude:
            places.set_excluded(v, args.exclude, True)
        elif args.include:
            places.set_excluded(v, args.include, False)
        rows = places.describe_places(v)
    emit(args, rows, places.places_text(rows))
    return 0


def _quiz(args) -> int:
    import json

    from .. import quiz
    from ..vault import Vault

    home = home_from(args).require()
    policy = home.load_policy()
    with Vault.open(home) as v:
        if args.answers:
            n = quiz.import_answers(v, args.answers)
            s = quiz.score(v, policy)
            emit(args, {"imported": n, "score": s}, f"Imported {n} answer(s). " + quiz.score_text(s))
            return 0
        if args.issue or args.export_trials:
            if args.issue:
                quiz.issue_trials(v, policy, n=args.issue)
            pending = quiz.pending_trials(v)
            public = [{k: t[k] for k in ("trial_id", "cue_text", "options")} for t in pending]
            if args.export_trials:
                from pathlib import Path

                from ..fsutil import write_private

                write_private(Path(args.export_trials),
                              json.dumps({"trials": public}, indent=2).encode())
            emit(args, {"pending": public}, f"{len(pending)} trial(s) waiting for an answer.")
            return 0
        if args.json:
            emit(args, quiz.score(v, policy))
            return 0
        quiz.run_session(v, policy)
    return 0


_DURATION = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([smhd])\s*$")


def parse_duration(text: str) -> float:
    """``"90s"``, ``"30m"``, ``"2h"``, ``"1.5d"`` -> seconds."""
    from ..errors import UsageError

    m = _DURATION.match(text or "")
    if not m:
        raise UsageError(f"duration {text!r}: expected a number and a unit s, m, h or d (e.g. 30m, 2h)")
    return float(m.group(1)) * {"s": 1, "m": 60, "h": 3600, "d": 86400}[m.group(2)]


def _ledger(home):
    from ..keystore import Keystore
    from ..ledger import Ledger

    return Ledger(home, signing_key=Keystore(home).device_key())


def _pause(args) -> int:
    import time

    from ..pause import set_paused

    home = home_from(args).require()
    until = time.time() + parse_duration(args.duration) if args.duration else None
    st = set_paused(home, until=until, ledger=_ledger(home))
    if until:
        import datetime as dt

        when = dt.datetime.fromtimestamp(until, home.timezone()).strftime("%a %d %b %H:%M")
    else:
        when = "you run 'lethe resume'"
    emit(args, st, f"Paused until {when}. Files that arrive are destroyed without being read; "
                   f"nothing is kept from them.")
    return 0


def _resume(args) -> int:
    from ..pause import clear_pause

    home = home_from(args).require()
    st = clear_pause(home, ledger=_ledger(home))
    emit(args, st, "Resumed: files that arrive are taken in again.")
    return 0


def _withdraw(args) -> int:
    from ..participant.withdraw import withdrawal_pending, withdraw
    from ..uploader import server_of

    home = home_from(args)
    try:
        server = server_of(home)  # read before the card is destroyed
    except Exception:  # noqa: BLE001 - a damaged card must not stand in the way of a withdrawal
        server = None
    if withdrawal_pending(home):
        # Interrupted after the certificate was signed: the participant already confirmed; finish the job.
        res = withdraw(home)
        emit(args, res, "Finished an interrupted withdrawal.\n" + _withdrawal_words(res, server))
        return 0
    home.require()
    cfg = home.read_config()
    if not args.yes:
        if not sys.stdin.isatty():
            from ..errors import UsageError

            raise UsageError("withdrawal destroys everything; confirm in a terminal or pass --yes")
        unsent = sum(1 for p in home.outbox.iterdir() if p.is_file()) if home.outbox.exists() else 0
        print("This cannot be undone. It destroys everything lethe holds on this laptop: the codes, your "
              "place names, your memory-test answers, the keys and the record of what happened."
              + (f" {unsent} prepared summary file(s) not yet sent to the study are destroyed too."
                 if unsent else "")
              + " Only a signed note that you withdrew remains.")
        reply = input(f"Type the study id ({cfg.get('study_id')}) to withdraw: ")
        if reply.strip() != cfg.get("study_id"):
            print("Not withdrawn.")
            return 1
    res = withdraw(home)
    emit(args, res, _withdrawal_words(res, server))
    return 0


def _withdrawal_words(res: dict, server: tuple[str, str] | None) -> str:
    """What happened, in words; sends a signed certificate to the study server once when the card names one.

    Adds ``res["upload"]`` (``sent``, ``failed: reason``, ``not signed`` or ``no server``).
    """
    import shlex

    from ..errors import LetheError
    from ..uploader import upload_withdrawal

    cert = res["certificate"]
    lines = ["You have withdrawn; everything lethe held on this laptop was destroyed."]
    if res.get("service_removed"):
        lines.append(f"The background service was stopped and removed ({res['service_removed']}).")
    if not res.get("signed", True):
        res["upload"] = "not signed"
        lines.append(f"The withdrawal note could NOT be signed: {res.get('unsigned_reason')}")
        lines.append(f"An unsigned note was left at {cert}; the study cannot check it on its own, so please "
                     f"contact the study team (the contact on your study card) to confirm your withdrawal.")
        return "\n".join(lines)
    if server is None:
        res["upload"] = "no server"
        lines.append(f"Send this signed note to the study team so they can remove what they already received: "
                     f"{cert}")
        return "\n".join(lines)
    url, pin = server
    try:
        ack = upload_withdrawal(cert, url, pin, attempts=1)
    except LetheError as e:
        res["upload"] = f"failed: {e}"
        later = shlex.join(["lethe", "upload", "--withdrawal", cert, "--server", url, "--pin", pin])
        lines.append(f"The study server {url} could not be reached ({e}).")
        lines.append(f"Your signed note is kept at {cert}. Send it later with:\n  {later}\n"
                     f"or hand it to the study team as agreed.")
        return "\n".join(lines)
    res["upload"] = "sent"
    lines.append(f"The signed note was sent to the study server, which confirmed it ({ack.get('status')}); "
                 f"a copy stays at {cert}.")
    return "\n".join(lines)


_PAGE_PATHS = {"today": "/", "places": "/places", "test": "/test", "feel": "/feel", "leaves": "/leaves",
               "pause": "/pause"}


def _open(args) -> int:
    import signal
    import threading

    from ..participant.web import PageServer, login_url, open_browser, read_page_info

    home = home_from(args).require()
    path = _PAGE_PATHS[args.page]
    info = read_page_info(home)

    def show(url: str) -> None:
        if args.print_url or not open_browser(url):
            print(url, flush=True)
            if not args.print_url:
                print("Could not start a browser: open the link above in yours (it works once, for 2 minutes).")

    if info:
        show(login_url(home, info["port"], path))
        return 0
    stop = threading.Event()
    old = {s: signal.signal(s, lambda *_: stop.set()) for s in (signal.SIGTERM, signal.SIGINT)}
    try:
        with PageServer(home) as server:
            print("lethe is not running in the background, so this terminal serves your page until you "
                  "press Ctrl-C.", file=sys.stderr, flush=True)
            show(server.url(path))
            while not stop.is_set() and not server.withdrawn.is_set():
                stop.wait(0.5)
            if server.withdrawn.is_set():
                stop.wait(1.0)  # let the last page reach the browser
    finally:
        for s, h in old.items():
            signal.signal(s, h)
    return 0


def _service(args) -> int:
    from ..participant import service

    home = home_from(args)
    if args.service_command == "install":
        plan = service.install(home, dry_run=args.dry_run, manager=args.manager)
    else:
        plan = service.remove(home, dry_run=args.dry_run, manager=args.manager)
    if args.dry_run or plan.manager == "none":
        print(plan.describe())
    else:
        print(f"{'Installed and enabled' if args.service_command == 'install' else 'Removed'}: {plan.path}")
    return 0
