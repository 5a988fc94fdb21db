"""``lethe upload``: send what is prepared to the study server named on the card (and show what waits)."""

from __future__ import annotations

from ._common import add_json, emit, home_from


def register(sub) -> None:
    p = sub.add_parser("upload", help="send prepared files to the study server on the card; show what waits")
    p.add_argument("--invitation", metavar="CODE",
                   help="the one-time invitation code from the study: queue this device's enrolment with it")
    p.add_argument("--status", action="store_true", help="only show what is prepared, sent and refused")
    p.add_argument("--withdrawal", metavar="CERT",
                   help="send a withdrawal certificate now (the home is emptied by then: give --card, or --server "
                        "and --pin)")
    p.add_argument("--card", metavar="CARD", help="with --withdrawal: the study card you received (names the server)")
    p.add_argument("--server", metavar="URL", help="with --withdrawal: the study server's address")
    p.add_argument("--pin", metavar="SHA256", help="with --withdrawal: the certificate pin from the study card")
    add_json(p)
    p.set_defaults(func=_upload)


def _upload(args) -> int:
    from ..errors import UsageError
    from ..participant.status import upload_lines
    from ..uploader import Uploader, queue_status, upload_withdrawal

    if args.withdrawal:
        if args.card:
            from ..study.card import load_card

            card = load_card(args.card)
            if not card.server_url:
                raise UsageError(f"{args.card}: this study card names no server; send the certificate to the "
                                 f"study as agreed")
            args.server, args.pin = card.server_url, card.server_pin
        if not (args.server and args.pin):
            raise UsageError("--withdrawal needs --card CARD, or --server URL and --pin SHA256 (both on the card)")
        ack = upload_withdrawal(args.withdrawal, args.server, args.pin)
        emit(args, ack, f"{args.withdrawal}: sent; the study server acknowledged it ({ack.get('status')})")
        return 0
    home = home_from(args).require()
    up = Uploader(home)
    if up.server is None:
        emit(args, queue_status(home), "\n".join(upload_lines(queue_status(home))))
        return 0
    if args.invitation:
        up.enqueue_enrolment(args.invitation)
    res = None
    if not args.status:
        up.enqueue_outbox()
        res = up.run_once()
    st = queue_status(home)
    emit(args, {"run": res, **st}, "\n".join(upload_lines(st)))
    return 0
