"""Where lethe keeps things on disk, with what permissions, and the agent lock.

The home is a per-user data directory (``platformdirs.user_data_dir("lethe")``),
overridable with the ``LETHE_HOME`` environment variable or ``--home``.  Layout
(documented in ``docs/home.md``)::

    HOME/
      inbox/            raw drops from recorders; the only place lethe deletes files
      vault.db          SQLite (WAL); every payload AEAD-encrypted
      ledger.jsonl      append-only, hash-chained, signed audit log (no content)
      ledger.head       signed anchor of the last ledger entry (rollback detection)
      outbox/           sealed, signed bundles waiting to leave
      keys/             vault.key, content.key, device.ed25519 (all 0600)
      logs/             agent.log (rotated; never personal content)
      state/            home.json (pseudonym, time zone, enrolment), pause.json, agent.lock
      policy.toml       the enrolled policy, copied verbatim
      cache/numba/      NUMBA_CACHE_DIR for librosa's compiled functions

Directories are created 0700 and files 0600 so no other local user can read them.
"""

from __future__ import annotations

import json
import os
from contextlib import contextmanager, suppress
from pathlib import Path

from .errors import StateError
from .fsutil import DIR_MODE, FILE_MODE, LockHeld, file_lock, write_private

__all__ = ["DIR_MODE", "FILE_MODE", "SUBDIRS", "Home", "default_home_path", "overwrite_and_unlink"]

SUBDIRS = ("inbox", "outbox", "keys", "logs", "state", "cache", "cache/numba")


def default_home_path() -> Path:
    env = os.environ.get("LETHE_HOME")
    if env:
        return Path(env).expanduser()
    import platformdirs

    return Path(platformdirs.user_data_dir("lethe", appauthor=False))


class Home:
    """The agent's own directory tree.

    Parameters
    ----------
    root : path-like, optional
        The home directory; defaults to ``LETHE_HOME`` or the platform's
        per-user data directory.
    """

    def __init__(self, root=None):
        self.root = Path(root).expanduser() if root is not None else default_home_path()
        self.root = self.root.absolute()

    # -- paths -----------------------------------------------------------
    inbox = property(lambda self: self.root / "inbox")
    outbox = property(lambda self: self.root / "outbox")
    keys = property(lambda self: self.root / "keys")
    logs = property(lambda self: self.root / "logs")
    state = property(lambda self: self.root / "state")
    vault_path = property(lambda self: self.root / "vault.db")
    ledger_path = property(lambda self: self.root / "ledger.jsonl")
    ledger_head_path = property(lambda self: self.root / "ledger.head")
    policy_path = property(lambda self: self.root / "policy.toml")
    config_path = property(lambda self: self.root / "state" / "home.json")
    pause_path = property(lambda self: self.root / "state" / "pause.json")
    lock_path = property(lambda self: self.root / "state" / "agent.lock")
    numba_cache = property(lambda self: self.root / "cache" / "numba")

    def exists(self) -> bool:
        return self.config_path.exists()

    # -- creation ----------------------------------------------------------
    def create(self) -> Home:
        """Create the directory tree with private permissions (idempotent)."""
        old = os.umask(0o077)
        try:
            self.root.mkdir(parents=True, exist_ok=True, mode=DIR_MODE)
            os.chmod(self.root, DIR_MODE)
            for sub in SUBDIRS:
                p = self.root / sub
                p.mkdir(parents=True, exist_ok=True, mode=DIR_MODE)
                os.chmod(p, DIR_MODE)
        finally:
            os.umask(old)
        return self

    def require(self) -> Home:
        if not self.exists():
            raise StateError(f"{self.root}: no lethe home here; run 'lethe init' first "
                             f"(or set LETHE_HOME / --home to an existing home)")
        return self

    # -- config ------------------------------------------------------------
    def read_config(self) -> dict:
        try:
            return json.loads(self.config_path.read_text("utf-8"))
        except FileNotFoundError:
            return {}

    def write_config(self, config: dict) -> None:
        write_private(self.config_path, json.dumps(config, indent=2, sort_keys=True).encode())

    def update_config(self, **changes) -> dict:
        cfg = self.read_config()
        cfg.update(changes)
        self.write_config(cfg)
        return cfg

    def load_policy(self):
        from .policy import load_policy

        if not self.policy_path.exists():
            raise StateError(f"{self.policy_path}: this home has no policy; run 'lethe init' first")
        return load_policy(self.policy_path)

    def timezone(self):
        from zoneinfo import ZoneInfo

        tz = self.read_config().get("timezone")
        if tz:
            return ZoneInfo(tz)
        return ZoneInfo(self.load_policy().study.default_timezone)

    # -- locking -----------------------------------------------------------
    @contextmanager
    def lock(self, what: str = "agent"):
        """Hold an exclusive lock on the home; a second agent gets a clear error."""
        try:
            with file_lock(self.lock_path, blocking=False, note=f"pid {os.getpid()} ({what})"):
                yield self
        except LockHeld as e:
            raise StateError(f"{self.root}: another lethe process holds this home ({e.holder or '?'}); "
                             f"stop it first or use a different --home") from None

    # -- disk use -----------------------------------------------------------
    def disk_usage(self) -> int:
        total = 0
        for dirpath, _dirs, files in os.walk(self.root):
            for f in files:
                with suppress(OSError):
                    total += os.lstat(os.path.join(dirpath, f)).st_size
        return total



def overwrite_and_unlink(path: Path) -> None:
    """Best-effort overwrite with zeros, then unlink, through :mod:`agent.destroy` (the one safe way).

    The folder holding ``path`` is opened without following a link, the file
    is checked with ``fstat`` before writing, only its allocated data are
    overwritten (at most 1 GiB; larger files are only unlinked), and a symlink
    is removed, never followed.  Overwriting is not guaranteed erasure on flash
    storage, journaling or copy-on-write filesystems, snapshots or backups
    (NIST SP 800-88).
    """
    from .destroy import destroy_path

    try:
        destroy_path(path, max_bytes=1 << 30)
    except FileNotFoundError:
        return
