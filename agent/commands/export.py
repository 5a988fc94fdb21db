"""``lethe export``: show exactly what would leave, then seal and sign it into the outbox."""

from __future__ import annotations

from ._common import add_json, emit, home_from


def register(sub) -> None:
    p = sub.add_parser("export", help="preview, seal and sign the next bundle for the study")
    p.add_argument("--preview", action="store_true",
                   help="only show what the bundle would hold (plain words, or the payload with --json); "
                        "writes nothing")
    p.add_argument("--yes", action="store_true",
                   help="confirm without asking (when the policy asks for confirmation of each export)")
    add_json(p)
    p.set_defaults(func=_export)


def _server(home) -> str | None:
    """The study server the card names (None: bundles travel as files)."""
    from ..uploader import queue_status

    return queue_status(home)["server"]


def _ask(text: str, server: str | None = None) -> bool:
    import sys

    from ..errors import UsageError

    if not sys.stdin.isatty():
        raise UsageError("the policy asks you to confirm each export (export.confirm_each); "
                         "run in a terminal, or pass --yes after checking 'lethe export --preview'")
    how = (f"lethe then sends it to the study server {server}" if server
           else "lethe does not send it itself; you copy it to the study as agreed")
    sys.stdout.write(text + f"\n\nSeal this for the study and put it in the outbox? {how}. [y/N] ")
    sys.stdout.flush()
    return sys.stdin.readline().strip().lower() in ("y", "yes")


def _export(args) -> int:
    from ..export import export_bundle
    from ..export import build_payload, preview
    from ..vault import Vault

    home = home_from(args).require()
    policy = home.load_policy()
    if args.preview:
        with Vault.open(home) as vault:
            payload = build_payload(home, policy, vault)
        emit(args, payload, preview(payload))
        return 0
    server = _server(home)
    confirm = (lambda text: True) if args.yes else (lambda text: _ask(text, server))
    path = export_bundle(home, policy, confirm=confirm)
    if path is None:
        emit(args, {"prepared": False, "sent": False}, "Declined: nothing was prepared, nothing leaves.")
        return 0
    emit(args, {"prepared": True, "sent": False, "bundle": str(path), "bytes": path.stat().st_size},
         f"Prepared {path.name} ({path.stat().st_size} bytes), sealed for the study and signed, in {path.parent}. "
         + (f"It has not been sent yet: it waits for the study server {server} ('lethe upload' now, "
          "or the running agent on its own); 'lethe status' says when the server confirmed it."
          if server else "It has not been sent: copy it to the study as agreed."))
    return 0
