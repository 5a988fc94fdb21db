"""Desktop notifications for mood prompts: freedesktop notifications over D-Bus, or macOS's centre.

On Linux the notification goes to ``org.freedesktop.Notifications`` on the
session bus (the Desktop Notifications Specification, version 1.2) through
``jeepney``, with a ``default`` action: clicking it makes the agent open the
page's mood question with a fresh login link.  On macOS it goes through
``osascript`` (``display notification``), which has no click action; the text
says to run ``lethe open``.  Without a session bus or a notification server,
:func:`notify` returns ``None`` and the prompt still shows on the page.
"""

from __future__ import annotations

import logging
import shutil
import subprocess
import sys
import threading

log = logging.getLogger("lethe.notify")

APP_NAME = "lethe"
BUS_NAME = "org.freedesktop.Notifications"
OBJECT_PATH = "/org/freedesktop/Notifications"
INTERFACE = "org.freedesktop.Notifications"


class Notifier:
    """Sends notifications and calls ``on_click`` when the participant clicks one.

    Parameters
    ----------
    on_click : callable, optional
        Called (in a background thread) with no argument when a notification's
        default action is invoked.
    bus : str
        ``"SESSION"`` (default) or a D-Bus address such as ``unix:path=/run/...``.
    """

    def __init__(self, on_click=None, bus: str = "SESSION"):
        self.on_click = on_click
        self.bus = bus
        self._conn = None
        self._ours: set[int] = set()
        self._listener: threading.Thread | None = None
        self._closed = threading.Event()

    # -- Linux ----------------------------------------------------------------------
    def _connect(self):
        if self._conn is None:
            from jeepney.io.blocking import open_dbus_connection

            self._conn = open_dbus_connection(bus=self.bus)
        return self._conn

    def notify(self, summary: str, body: str, *, timeout_ms: int = -1) -> int | None:
        """Show a notification; the server's id, or None when none could be shown."""
        if sys.platform == "darwin":
            return self._notify_macos(summary, body)
        try:
            from jeepney import DBusAddress, new_method_call

            conn = self._connect()
            addr = DBusAddress(OBJECT_PATH, bus_name=BUS_NAME, interface=INTERFACE)
            actions = ["default", "Answer now"] if self.on_click else []
            msg = new_method_call(addr, "Notify", "susssasa{sv}i",
                                  (APP_NAME, 0, "", summary, body, actions,
                                   {"urgency": ("y", 1), "category": ("s", "im.received")}, int(timeout_ms)))
            reply = conn.send_and_get_reply(msg, timeout=5)
            nid = int(reply.body[0])
        except Exception as e:  # noqa: BLE001 - no bus, no server, a refusal: the page still shows it
            log.info("no desktop notification (%s)", type(e).__name__)
            return None
        self._ours.add(nid)
        if self.on_click and self._listener is None:
            self._listener = threading.Thread(target=self._listen, name="lethe-notify", daemon=True)
            self._listener.start()
        return nid

    def _listen(self) -> None:
        from jeepney import MatchRule, message_bus
        from jeepney.io.blocking import open_dbus_connection

        rule = MatchRule(type="signal", interface=INTERFACE, member="ActionInvoked", path=OBJECT_PATH)
        try:
            conn = open_dbus_connection(bus=self.bus)
            conn.send_and_get_reply(message_bus.AddMatch(rule), timeout=5)
            with conn.filter(rule) as queue:
                while not self._closed.is_set():
                    try:
                        msg = conn.recv_until_filtered(queue, timeout=1.0)
                    except TimeoutError:
                        continue
                    nid, action = msg.body
                    if int(nid) in self._ours and action == "default" and self.on_click:
                        self.on_click()
        except Exception as e:  # noqa: BLE001 - the listener must never take the agent down
            log.info("notification clicks not followed (%s)", type(e).__name__)

    # -- macOS ----------------------------------------------------------------------
    @staticmethod
    def _notify_macos(summary: str, body: str) -> int | None:
        exe = shutil.which("osascript")
        if not exe:
            return None

        def q(s: str) -> str:
            return '"' + s.replace("\\", "\\\\").replace('"', '\\"') + '"'
        r = subprocess.run([exe, "-e", f"display notification {q(body)} with title {q(summary)}"],
                           capture_output=True, check=False)
        return 0 if r.returncode == 0 else None

    def close(self) -> None:
        self._closed.set()
        if self._conn is not None:
            self._conn.close()
            self._conn = None
        if self._listener is not None:
            self._listener.join(3)
