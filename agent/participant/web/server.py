"""Serving the page: on 127.0.0.1 only, from the agent (a thread) or from ``lethe open`` itself.

The serving process records its port and process id in ``HOME/state/page.json``
(0600) so ``lethe open`` can find it; the file is removed when serving stops.
"""

from __future__ import annotations

import json
import os
import socket
import threading
import time
import webbrowser

from ...fsutil import write_private
from ...home import Home
from . import auth

LOOPBACK = "127.0.0.1"


def page_info_path(home: Home):
    return home.state / "page.json"


def read_page_info(home) -> dict | None:
    """``{"port", "pid"}`` of a live page server for ``home``, else None."""
    home = home if isinstance(home, Home) else Home(home)
    try:
        info = json.loads(page_info_path(home).read_text("utf-8"))
        os.kill(int(info["pid"]), 0)
    except (FileNotFoundError, ValueError, KeyError, TypeError, ProcessLookupError, PermissionError):
        return None
    return info


def login_url(home, port: int, next_path: str = "/") -> str:
    """A URL with a fresh one-time token (see :mod:`.auth`)."""
    token = auth.mint_login(home)
    url = f"http://{LOOPBACK}:{int(port)}/login?t={token}"
    return url + (f"&next={next_path}" if next_path != "/" else "")


def _quiet_server(config):
    """A ``uvicorn.Server`` that sleeps until asked to stop instead of ticking ten times a second.

    uvicorn's own main loop wakes every 0.1 s to check ``should_exit`` and to
    refresh the ``Date`` header; the page sends no ``Date`` header
    (``date_header=False``), so its loop only has to wake for the stop, which
    :meth:`request_exit` delivers from any thread.  A running agent with an
    idle page then costs no CPU (measured in ``benchmarks/bench_intake.py``).
    """
    import asyncio
    import contextlib

    import uvicorn

    class QuietServer(uvicorn.Server):
        _loop: asyncio.AbstractEventLoop | None = None
        _wake: asyncio.Event | None = None

        async def main_loop(self) -> None:
            self._wake = asyncio.Event()
            self._loop = asyncio.get_running_loop()
            if await self.on_tick(0):
                return
            while not self.should_exit:
                with contextlib.suppress(asyncio.TimeoutError):
                    # The timeout is only a safety net for a stop set without request_exit().
                    await asyncio.wait_for(self._wake.wait(), timeout=30.0)

        def request_exit(self) -> None:
            self.should_exit = True
            loop, wake = self._loop, self._wake
            if loop is not None and wake is not None:
                with contextlib.suppress(RuntimeError):   # the loop has already closed
                    loop.call_soon_threadsafe(wake.set)

    return QuietServer(config)


class PageServer:
    """The page on a loopback socket, served by uvicorn in a background thread.

    Parameters
    ----------
    home : Home or path-like
    port : int
        0 (default) picks a free port.
    in_agent, stop_agent : see :func:`agent.participant.web.app.build_app`.
    """

    def __init__(self, home, port: int = 0, *, in_agent: bool = False, stop_agent=None):
        import uvicorn

        from .app import build_app

        self.home = home if isinstance(home, Home) else Home(home)
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self.sock.bind((LOOPBACK, int(port)))
        self.port = self.sock.getsockname()[1]
        self.withdrawn = threading.Event()
        app = build_app(self.home, self.port, in_agent=in_agent, stop_agent=stop_agent,
                        on_withdrawn=self._after_withdrawal)
        config = uvicorn.Config(app, log_level="warning", access_log=False, lifespan="off",
                                server_header=False, date_header=False, timeout_graceful_shutdown=5)
        self.server = _quiet_server(config)
        self.thread: threading.Thread | None = None

    def start(self) -> PageServer:
        self.thread = threading.Thread(target=self.server.run, kwargs={"sockets": [self.sock]},
                                       name="lethe-page", daemon=True)
        self.thread.start()
        deadline = time.monotonic() + 30
        while not self.server.started and self.thread.is_alive() and time.monotonic() < deadline:
            time.sleep(0.02)
        write_private(page_info_path(self.home), json.dumps({"port": self.port, "pid": os.getpid()}).encode())
        return self

    def url(self, next_path: str = "/") -> str:
        return login_url(self.home, self.port, next_path)

    def _after_withdrawal(self) -> None:
        self.withdrawn.set()

    def stop(self) -> None:
        self.server.request_exit()
        if self.thread is not None:
            self.thread.join(10)
        try:
            info = json.loads(page_info_path(self.home).read_text("utf-8"))
            if int(info.get("pid", -1)) == os.getpid():
                page_info_path(self.home).unlink()
        except (FileNotFoundError, ValueError, OSError):
            pass
        self.sock.close()

    def __enter__(self):
        return self.start()

    def __exit__(self, *exc):
        self.stop()


def open_browser(url: str) -> bool:
    """Start the participant's browser on ``url`` (False when none could be started)."""
    try:
        return bool(webbrowser.open(url, new=1))
    except webbrowser.Error:
        return False
