"""The real Secret Service session the keyring tests share (``bash .ci/with-keyring``).

``.ci/with-keyring`` starts a private D-Bus session with an unlocked
gnome-keyring and sets LETHE_SECRET_SERVICE=1.  Without it the keyring tests
are skipped, except under CI (LETHE_CI_SERVICES=1), where a missing Secret
Service is a failure.
"""

from __future__ import annotations

import contextlib
import os
import subprocess
import sys
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path

import pytest


def require_secret_service() -> None:
    """Call at a test module's top: skip it without a Secret Service (fail under CI)."""
    if not os.environ.get("LETHE_SECRET_SERVICE"):
        if os.environ.get("LETHE_CI_SERVICES"):
            raise RuntimeError("CI: the keyring tests need a Secret Service; run them under bash .ci/with-keyring")
        pytest.skip("no Secret Service here; run under bash .ci/with-keyring", allow_module_level=True)


def use_real_keyring(monkeypatch):
    """Undo the suite's keyring switches for one test and check ``keyring`` reaches the Secret Service.

    Returns the ``keyring`` module.
    """
    monkeypatch.delenv("LETHE_NO_KEYRING", raising=False)
    monkeypatch.delenv("LETHE_KEY_STORAGE", raising=False)
    import keyring
    import keyring.backends.SecretService

    assert isinstance(keyring.get_keyring(), keyring.backends.SecretService.Keyring)
    return keyring


def forget_keyring_entries(docs: Iterable[Mapping]) -> None:
    """Delete the keyring entries named by key files' ``service``/``account`` (those still there)."""
    import keyring
    import keyring.errors

    for doc in docs:
        with contextlib.suppress(keyring.errors.PasswordDeleteError):
            keyring.delete_password(doc["service"], doc["account"])


REPO = Path(__file__).resolve().parent.parent
# What ties a process to this test run's D-Bus session and keyring, or switches the keyring off.
SESSION_ENV = ("LETHE_IN_KEYRING_SESSION", "XDG_RUNTIME_DIR", "XDG_DATA_HOME", "LETHE_KEYRING_DATA",
               "DBUS_SESSION_BUS_ADDRESS", "LETHE_KEY_STORAGE", "LETHE_NO_KEYRING")


def in_a_fresh_keyring_session(argv: Sequence[str], timeout_s: float = 180) -> subprocess.CompletedProcess:
    """Run ``argv`` in a new D-Bus session with a new, empty keyring (as on another machine)."""
    env = {k: v for k, v in os.environ.items() if k not in SESSION_ENV}
    env["PYTHONPATH"] = str(REPO)
    env["PATH"] = os.path.dirname(sys.executable) + ":/usr/bin:/bin"
    return subprocess.run(["bash", str(REPO / ".ci" / "with-keyring"), *argv],
                          env=env, capture_output=True, text=True, timeout=timeout_s)
