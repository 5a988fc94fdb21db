"""Serving the study: uvicorn over HTTPS (the study's certificate, or a self-signed one)."""

from __future__ import annotations

from pathlib import Path

from ...errors import StateError, UsageError
from .app import ServerSettings, create_app
from .intake import StudyContext
from .store import Store, default_url


def build(study_dir, passphrase, settings: ServerSettings, database: str | None = None):
    """The study context and the ASGI app (the study key is unlocked once, here)."""
    from ..card import study_card
    from ..keys import load_study_key

    key = load_study_key(study_dir, passphrase)
    card = study_card(study_dir)
    store = Store(database or default_url(study_dir), key.study_id)
    ctx = StudyContext(key.study_id, key, card, store)
    return ctx, create_app(study_dir, ctx, settings)


def serve(study_dir, passphrase, settings: ServerSettings, *, host: str = "127.0.0.1", port: int = 8443,
          certfile=None, keyfile=None, self_signed: bool = False, database: str | None = None,
          ready=None) -> None:
    """Run the server until interrupted.

    Parameters
    ----------
    certfile, keyfile : path-like
        The study's TLS certificate and key (PEM).  Or ``self_signed=True``.
    ready : callable(url, pin), optional
        Called once the socket is bound (the demo uses it).
    """
    import uvicorn

    from .tls import cert_pin, self_signed as make_self_signed

    if self_signed:
        certfile, keyfile = make_self_signed(study_dir, hosts=("localhost", "127.0.0.1", host))
    if not certfile or not keyfile:
        raise UsageError("serve: HTTPS needs --cert and --key (the study's certificate), or --self-signed")
    if not Path(certfile).exists() or not Path(keyfile).exists():
        raise StateError(f"serve: certificate {certfile} or key {keyfile} does not exist")
    _, app = build(study_dir, passphrase, settings, database)
    config = uvicorn.Config(app, host=host, port=port, ssl_certfile=str(certfile), ssl_keyfile=str(keyfile),
                            log_level="warning", access_log=False, proxy_headers=False, server_header=False,
                            timeout_keep_alive=10, limit_concurrency=2000, backlog=2048)
    server = uvicorn.Server(config)
    if ready is not None:
        pin = cert_pin(Path(certfile).read_bytes())
        orig = server.startup

        async def startup(sockets=None):
            await orig(sockets=sockets)
            ready(f"https://{host}:{port}", pin)
        server.startup = startup  # type: ignore[method-assign]
    server.run()
