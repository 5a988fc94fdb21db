"""Serving the study: uvicorn over HTTPS (the study's certificate, or a self-signed one)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

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


class ServerThread:
    """The study server in a background thread of this process (the demo; loopback use).

    ``start()`` returns once the socket is bound; ``stop()`` shuts it down.
    """

    def __init__(self, study_dir, passphrase, settings: ServerSettings, *, host: str = "127.0.0.1",
                 port: int = 0, database: str | None = None):
        import socket

        from .tls import cert_pin, self_signed

        self.cert, self.key = self_signed(study_dir, hosts=("localhost", "127.0.0.1", host))
        self.pin = cert_pin(Path(self.cert).read_bytes())
        if port == 0:
            with socket.socket() as s:
                s.bind((host, 0))
                port = s.getsockname()[1]
        self.host, self.port = host, port
        self.url = f"https://{host}:{port}"
        self.study_dir, self.passphrase, self.settings, self.database = study_dir, passphrase, settings, database
        self.ctx: StudyContext | None = None
        self._server: Any = None
        self._thread: Any = None

    def start(self) -> ServerThread:
        import threading
        import time

        import uvicorn

        self.ctx, app = build(self.study_dir, self.passphrase, self.settings, self.database)
        cfg = uvicorn.Config(app, host=self.host, port=self.port, ssl_certfile=str(self.cert),
                             ssl_keyfile=str(self.key), log_level="warning", access_log=False, server_header=False)
        self._server = uvicorn.Server(cfg)
        self._server.install_signal_handlers = lambda: None  # type: ignore[method-assign]
        self._thread = threading.Thread(target=self._server.run, name="lethe-study-server", daemon=True)
        self._thread.start()
        deadline = time.monotonic() + 30
        while not self._server.started:
            if not self._thread.is_alive() or time.monotonic() > deadline:
                raise StateError(f"the study server did not start on {self.url}")
            time.sleep(0.02)
        return self

    def stop(self) -> None:
        if self._server is not None:
            self._server.should_exit = True
            self._thread.join(15)
        if self.ctx is not None:
            self.ctx.store.close()
