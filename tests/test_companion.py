"""The running agent's companion: an open mood prompt raises a notification whose click opens the page.

The notification goes over a private D-Bus session bus (the real dbus-daemon) to
the recording notification service of ``tests/test_notify.py`` (no real
notification server can run here without a display; see there).  The click
opens the page through ``webbrowser`` with a stand-in browser (``BROWSER``)
that follows the link and saves what it got.
"""

from __future__ import annotations

import json
import shutil
import sys
import threading
import time

import pytest

from page_home import make_page_home
from test_notify import RecordingServer, bus  # noqa: F401 - the bus fixture

pytestmark = pytest.mark.skipif(shutil.which("dbus-daemon") is None, reason="dbus-daemon is not installed")

FETCH = r'''
import sys, urllib.request, http.cookiejar
op = urllib.request.build_opener(urllib.request.HTTPCookieProcessor(http.cookiejar.CookieJar()))
import os
text = op.open(sys.argv[1], timeout=60).read().decode()
open(sys.argv[2] + ".part", "w").write(text)
os.replace(sys.argv[2] + ".part", sys.argv[2])  # appears whole
'''


def _with_a_prompt_open_now(root) -> None:
    """Choose the schedule seed so that a prompt is open now (waking all day)."""
    import secrets

    from agent.participant.prompts import PromptBook

    book = PromptBook(root, created=time.time() - 86400)
    book.counts()  # creates the schedule
    st = json.loads(book.path.read_text())
    st["waking"] = [{"from": "2000-01-01", "start": "00:00", "end": "24:00"}]
    for _ in range(500):
        st["seed"] = secrets.token_hex(32)
        book.path.write_text(json.dumps(st))
        if book.open_prompt() is not None:
            return
    pytest.fail("no seed gave an open prompt now")  # with 8 prompts a day open ~50% of the time


def test_open_prompt_is_announced_once_and_a_click_opens_the_mood_page(bus, tmp_path, monkeypatch):  # noqa: F811
    from agent.home import Home
    from agent.participant.companion import Companion

    root = make_page_home(tmp_path, days=1)
    _with_a_prompt_open_now(root)
    monkeypatch.setenv("DBUS_SESSION_BUS_ADDRESS", bus)
    (tmp_path / "fetch.py").write_text(FETCH)
    page = tmp_path / "page.html"
    monkeypatch.setenv("BROWSER", f"{sys.executable} {tmp_path / 'fetch.py'} %s {page}")
    server = RecordingServer(bus)
    home = Home(root)
    c = Companion(home, home.load_policy(), threading.Event(), check_every_s=0.2).start()
    try:
        assert server.got.wait(60), "no notification arrived"
        time.sleep(1.0)  # several more checks pass: the same prompt must not be announced again
        assert len(server.calls) == 1
        summary, body = server.calls[0][3], server.calls[0][4]
        assert summary == "How do you feel?" and "mood question is waiting" in body
        deadline = time.monotonic() + 60  # waiting for the click to reach the browser, not a timing check
        while not page.exists() and time.monotonic() < deadline:
            server.click(42)
            time.sleep(0.5)
        assert page.exists()
        text = page.read_text()
        assert "<h1>How I feel</h1>" in text and "A question has been waiting since" in text
    finally:
        c.close()
        server.close()
