"""What the running agent does for the participant besides intake: the page and the mood prompts.

``lethe run`` starts a :class:`Companion` beside the inbox watcher.  It serves
the participant's page on 127.0.0.1 (a free port, recorded for ``lethe open``)
and, once a minute, announces a newly opened mood prompt with a desktop
notification whose click opens the page's mood question.
"""

from __future__ import annotations

import logging
import threading
import time

from typing import TYPE_CHECKING

from ..home import Home

if TYPE_CHECKING:
    from .notify import Notifier
    from .web import PageServer

log = logging.getLogger("lethe.companion")


class Companion:
    """The page server and the prompt announcer of one running agent.

    Parameters
    ----------
    home : Home
    policy : agent.policy.Policy
    stop_event : threading.Event
        The agent's stop event; set by a withdrawal from the page.
    notify : bool
        Raise desktop notifications for prompts.
    check_every_s : float
        How often to look for a newly opened prompt.
    """

    def __init__(self, home: Home, policy, stop_event: threading.Event, *, notify: bool = True,
                 check_every_s: float = 60.0):
        self.home, self.policy, self.stop_event = home, policy, stop_event
        self.check_every_s = float(check_every_s)
        self.notify = notify
        self.server: PageServer | None = None
        self.notifier: Notifier | None = None
        self._withdrawing = threading.Event()
        self._closed = threading.Event()
        self._thread: threading.Thread | None = None

    def start(self) -> Companion:
        from .web import PageServer

        server = PageServer(self.home, in_agent=True, stop_agent=self._stop_agent).start()
        self.server = server
        log.info("participant page on 127.0.0.1:%d", server.port)
        if self.notify:
            from .notify import Notifier

            self.notifier = Notifier(on_click=self._open_feel)
        self._thread = threading.Thread(target=self._prompts, name="lethe-prompts", daemon=True)
        self._thread.start()
        return self

    def _open_feel(self) -> None:
        from .web import open_browser

        if self.server is not None:
            open_browser(self.server.url("/feel"))

    def _prompts(self) -> None:
        from .prompts import PromptBook

        while not self._closed.is_set():
            try:
                book = PromptBook(self.home, self.policy)
                op = book.open_prompt()
                if op and book.mark_notified(op.prompt_id) and self.notifier is not None:
                    import datetime as dt

                    until = dt.datetime.fromtimestamp(op.expires, self.home.timezone()).strftime("%H:%M")
                    self.notifier.notify("How do you feel?", f"A short mood question is waiting until {until}. "
                                                             f"Click to answer on your lethe page.")
            except Exception as e:  # noqa: BLE001 - prompts must never stop the agent
                log.warning("mood prompt check failed: %s", e)
            self._closed.wait(self.check_every_s)

    def _stop_agent(self) -> None:
        """For a withdrawal: stop intake and wait until the agent lets go of the home."""
        from .status import agent_running

        self._withdrawing.set()
        self.stop_event.set()
        deadline = time.monotonic() + 120
        while agent_running(self.home) and time.monotonic() < deadline:
            time.sleep(0.1)

    def close(self) -> None:
        """Stop serving; after a withdrawal from the page, first let that page be delivered."""
        if self._withdrawing.is_set() and self.server is not None:
            self.server.withdrawn.wait(120)
            time.sleep(0.5)
        self._closed.set()
        if self.notifier is not None:
            self.notifier.close()
        if self.server is not None:
            self.server.stop()
