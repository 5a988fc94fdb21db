"""Shared fixtures.  Keeps every test inside its own temporary home."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import pytest

# librosa's numba functions cache compiled code; give them a writable place
# that persists across test processes of one run.
os.environ.setdefault("NUMBA_CACHE_DIR", str(Path(tempfile.gettempdir()) / "lethe-test-numba"))
os.environ.setdefault("MPLBACKEND", "Agg")
# Never touch a developer's real OS keyring from the tests.
os.environ.setdefault("LETHE_NO_KEYRING", "1")
# Keys are held in the OS keyring by default; the suite chooses plain key files
# explicitly (the keyring tests in test_keystore_keyring.py use the real one).
os.environ.setdefault("LETHE_KEY_STORAGE", "plain")

REPO = Path(__file__).resolve().parent.parent


@pytest.fixture
def repo() -> Path:
    return REPO


@pytest.fixture
def default_policy():
    from agent.policy import load_policy

    return load_policy(REPO / "policies" / "default.toml")


@pytest.fixture
def home(tmp_path, monkeypatch):
    """A fresh, created home in a temporary directory (LETHE_HOME points at it)."""
    from agent.home import Home

    root = tmp_path / "home"
    monkeypatch.setenv("LETHE_HOME", str(root))
    return Home(root).create()


@pytest.fixture
def h(tmp_path):
    """A created home with the default policy copied in (the intake tests' home)."""
    from intake_samples import make_home

    return make_home(tmp_path / "home")
