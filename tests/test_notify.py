"""Desktop notifications over D-Bus (freedesktop Desktop Notifications Specification 1.2).

No notification server can run on the test machine: the packaged ones (dunst,
notification-daemon, xfce4-notifyd...) need an X11 or Wayland display.  So the
test starts a private D-Bus session bus (the real ``dbus-daemon``) and a small
recording service written here that owns ``org.freedesktop.Notifications``,
answers ``Notify`` with an id as the specification says, and emits
``ActionInvoked`` as a server does when the notification is clicked.  This is a
stub because the real thing cannot run here; the bus and the wire format are
real.
"""

from __future__ import annotations

import shutil
import subprocess
import threading

import pytest

pytestmark = pytest.mark.skipif(shutil.which("dbus-daemon") is None,
                                reason="dbus-daemon is not installed (.ci/services installs dbus)")


@pytest.fixture
def bus():
    p = subprocess.Popen(["dbus-daemon", "--session", "--nofork", "--print-address=1"],
                         stdout=subprocess.PIPE, text=True)
    address = p.stdout.readline().strip()
    assert address.startswith("unix:")
    yield address
    p.terminate()
    p.wait(10)


class RecordingServer:
    """Owns org.freedesktop.Notifications on ``address``; records Notify calls; can click."""

    def __init__(self, address: str):
        from jeepney import message_bus
        from jeepney.io.blocking import open_dbus_connection

        self.conn = open_dbus_connection(bus=address)
        reply = self.conn.send_and_get_reply(message_bus.RequestName("org.freedesktop.Notifications"), timeout=5)
        assert reply.body[0] == 1  # DBUS_REQUEST_NAME_REPLY_PRIMARY_OWNER (D-Bus specification)
        self.calls: list[tuple] = []
        self.got = threading.Event()
        self._stop = False
        self.thread = threading.Thread(target=self._serve, daemon=True)
        self.thread.start()

    def _serve(self):
        from jeepney import HeaderFields, MessageType, new_method_return

        while not self._stop:
            try:
                msg = self.conn.receive(timeout=0.5)
            except TimeoutError:
                continue
            except OSError:
                return
            h = msg.header
            if h.message_type == MessageType.method_call and h.fields.get(HeaderFields.member) == "Notify":
                self.calls.append(msg.body)
                self.conn.send(new_method_return(msg, "u", (41 + len(self.calls),)))
                self.got.set()

    def click(self, nid: int):
        from jeepney import DBusAddress, new_signal

        emitter = DBusAddress("/org/freedesktop/Notifications", interface="org.freedesktop.Notifications")
        self.conn.send(new_signal(emitter, "ActionInvoked", "us", (nid, "default")))

    def close(self):
        self._stop = True
        self.thread.join(3)
        self.conn.close()


def test_notification_reaches_the_server_and_a_click_opens_the_page(bus):
    from agent.participant.notify import Notifier

    server = RecordingServer(bus)
    clicked = threading.Event()
    n = Notifier(on_click=clicked.set, bus=bus)
    try:
        nid = n.notify("How do you feel?", "A short mood question is waiting until 15:35.")
        assert nid == 42
        app, replaces, icon, summary, body, actions, hints, timeout = server.calls[0]
        assert (app, replaces, summary) == ("lethe", 0, "How do you feel?")
        assert "15:35" in body and actions == ["default", "Answer now"] and timeout == -1
        assert hints["urgency"] == ("y", 1)  # 1 = normal (specification, "Urgency Levels")
        # the listener subscribes before the click; wait until the bus knows the match rule
        for _ in range(50):
            server.click(nid)
            if clicked.wait(0.2):
                break
        assert clicked.is_set()
    finally:
        n.close()
        server.close()


def test_click_on_someone_elses_notification_is_ignored(bus):
    from agent.participant.notify import Notifier

    server = RecordingServer(bus)
    clicked = threading.Event()
    n = Notifier(on_click=clicked.set, bus=bus)
    try:
        nid = n.notify("How do you feel?", "x")
        for _ in range(10):
            server.click(nid + 100)
        assert not clicked.wait(1.0)
    finally:
        n.close()
        server.close()


def test_without_a_server_nothing_is_shown_and_nothing_fails(bus):
    from agent.participant.notify import Notifier

    n = Notifier(bus=bus)  # a bus with no notification server on it
    try:
        assert n.notify("How do you feel?", "x") is None
    finally:
        n.close()
