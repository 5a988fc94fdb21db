"""Per-user background service: a systemd user unit on Linux, a launchd agent on macOS.

The agent runs with low CPU and IO priority, restarts on failure and logs into
the home.  ``install`` writes the file and enables it; with ``dry_run`` (and on
platforms with neither service manager) it only returns the file and the
commands, so the participant can see exactly what would be done.
"""

from __future__ import annotations

import contextlib
import os
import shlex
import shutil
import subprocess
import sys
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import StateError

UNIT_NAME = "lethe-agent.service"
LAUNCHD_LABEL = "org.lethe.agent"


@dataclass
class ServicePlan:
    manager: str  # "systemd", "launchd" or "none"
    path: Path | None
    content: str
    enable: list[list[str]] = field(default_factory=list)
    disable: list[list[str]] = field(default_factory=list)

    def describe(self) -> str:
        lines = [f"service manager: {self.manager}"]
        if self.path:
            lines.append(f"file: {self.path}")
        lines += ["", self.content.rstrip(), ""]
        if self.enable:
            lines.append("commands to enable:")
            lines += ["  " + shlex.join(c) for c in self.enable]
        return "\n".join(lines)


def lethe_command() -> list[str]:
    """How to start this very installation.

    The ``lethe`` console script installed beside the running interpreter (the
    same virtual environment or prefix, wherever the package lives); else the
    first ``lethe`` on ``PATH``; else ``python -m agent.cli`` with this
    interpreter.  Paths are absolute but symlinks are kept: resolving a venv's
    ``python`` would leave the venv.
    """
    here = Path(sys.executable).absolute().parent / "lethe"
    if here.is_file() and os.access(here, os.X_OK):
        return [str(here)]
    exe = shutil.which("lethe")
    if exe:
        return [str(Path(exe).absolute())]
    return [str(Path(sys.executable).absolute()), "-m", "agent.cli"]


def detect_manager() -> str:
    if sys.platform == "darwin":
        return "launchd"
    if sys.platform.startswith("linux") and shutil.which("systemctl"):
        return "systemd"
    return "none"


def systemd_unit(home_root: Path, command: list[str]) -> str:
    exec_start = " ".join(shlex.quote(c) for c in command + ["--home", str(home_root), "run"])
    return f"""[Unit]
Description=lethe on-device study agent (destroys raw drops, keeps coarse codes)

[Service]
Type=simple
ExecStart={exec_start}
Environment=LETHE_HOME={home_root}
Environment=LETHE_SERVICE=1
Environment=NUMBA_CACHE_DIR={home_root}/cache/numba
Restart=on-failure
RestartSec=10
Nice=15
CPUSchedulingPolicy=idle
IOSchedulingClass=idle
UMask=0077
StandardOutput=append:{home_root}/logs/service.out
StandardError=append:{home_root}/logs/service.out

[Install]
WantedBy=default.target
"""


def launchd_plist(home_root: Path, command: list[str]) -> str:
    args = "".join(f"\n      <string>{_xml(c)}</string>" for c in command + ["--home", str(home_root), "run"])
    return f"""<?xml version="1.0" encoding="UTF-8"?>
<!DOCTYPE plist PUBLIC "-//Apple//DTD PLIST 1.0//EN" "http://www.apple.com/DTDs/PropertyList-1.0.dtd">
<plist version="1.0">
  <dict>
    <key>Label</key>
    <string>{LAUNCHD_LABEL}</string>
    <key>ProgramArguments</key>
    <array>{args}
    </array>
    <key>EnvironmentVariables</key>
    <dict>
      <key>LETHE_HOME</key>
      <string>{_xml(str(home_root))}</string>
      <key>LETHE_SERVICE</key>
      <string>1</string>
      <key>NUMBA_CACHE_DIR</key>
      <string>{_xml(str(home_root))}/cache/numba</string>
    </dict>
    <key>RunAtLoad</key>
    <true/>
    <key>KeepAlive</key>
    <dict>
      <key>SuccessfulExit</key>
      <false/>
    </dict>
    <key>ProcessType</key>
    <string>Background</string>
    <key>LowPriorityIO</key>
    <true/>
    <key>Nice</key>
    <integer>15</integer>
    <key>Umask</key>
    <integer>63</integer>
    <key>StandardOutPath</key>
    <string>{_xml(str(home_root))}/logs/service.out</string>
    <key>StandardErrorPath</key>
    <string>{_xml(str(home_root))}/logs/service.out</string>
  </dict>
</plist>
"""


def _xml(s: str) -> str:
    return s.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")


def plan(home, manager: str | None = None, command: list[str] | None = None) -> ServicePlan:
    manager = manager or detect_manager()
    command = command or lethe_command()
    root = Path(home.root)
    if manager == "launchd":
        path = Path.home() / "Library" / "LaunchAgents" / f"{LAUNCHD_LABEL}.plist"
        domain = f"gui/{os.getuid()}"
        return ServicePlan("launchd", path, launchd_plist(root, command),
                           enable=[["launchctl", "bootstrap", domain, str(path)]],
                           disable=[["launchctl", "bootout", f"{domain}/{LAUNCHD_LABEL}"]])
    config = Path(os.environ.get("XDG_CONFIG_HOME", Path.home() / ".config"))
    path = config / "systemd" / "user" / UNIT_NAME
    p = ServicePlan("systemd" if manager == "systemd" else "none", path, systemd_unit(root, command),
                    enable=[["systemctl", "--user", "daemon-reload"],
                            ["systemctl", "--user", "enable", "--now", UNIT_NAME]],
                    disable=[["systemctl", "--user", "disable", "--now", UNIT_NAME]])
    return p


def install(home, *, dry_run: bool = False, manager: str | None = None) -> ServicePlan:
    p = plan(home, manager)
    if dry_run:
        return p
    if p.manager == "none":
        raise StateError("no supported service manager (systemd user session or launchd) found; "
                         "use 'lethe service install --dry-run' to see the unit and run it yourself")
    assert p.path is not None  # a real manager always has a unit path
    existed = p.path.exists()
    made = [d for d in p.path.parents if not d.exists()]  # folders we are about to create, deepest first
    p.path.parent.mkdir(parents=True, exist_ok=True)
    p.path.write_text(p.content, encoding="utf-8")
    try:
        for cmd in p.enable:
            _run(cmd)
    except StateError as e:
        # Leave nothing behind: the file we wrote (and the folder, if we made it).
        if not existed:
            p.path.unlink(missing_ok=True)
            for d in made:
                try:
                    d.rmdir()
                except OSError:
                    break
        raise StateError(f"{_explain(p.manager, str(e))} Nothing was installed.") from None
    return p


def _explain(manager: str, error: str) -> str:
    """The failure in words, with what to do instead."""
    if manager == "systemd" and ("Failed to connect to bus" in error or "No medium found" in error):
        return ("The background service could not be installed: this session has no systemd user manager "
                "to talk to (common over ssh, in containers, or under sudo). Log in to the desktop and run "
                "'lethe service install' there, or ask your administrator to run "
                "'loginctl enable-linger YOUR-USER-NAME'; meanwhile 'lethe run' in a terminal does the same "
                f"work. (systemctl said: {error.split(': ', 1)[-1]})")
    if manager == "launchd":
        return ("The background service could not be loaded by launchd. Run 'lethe service install' from "
                f"your own logged-in account, not over ssh or sudo; meanwhile 'lethe run' does the same work. "
                f"({error})")
    return f"The background service could not be installed: {error}."


def remove(home, *, dry_run: bool = False, manager: str | None = None) -> ServicePlan:
    p = plan(home, manager)
    if dry_run or p.manager == "none":
        return p
    for cmd in p.disable:
        _run(cmd, check=False)
    assert p.path is not None  # a real manager always has a unit path
    if p.path.exists():
        p.path.unlink()
    if p.manager == "systemd":
        _run(["systemctl", "--user", "daemon-reload"], check=False)
    return p


def remove_installed(home, manager: str | None = None) -> str | None:
    """Disable and remove the unit installed for *this* home, if there is one; quiet otherwise.

    Used by withdrawal, so the service does not restart on an emptied home.
    A unit naming another home is left alone.  Under the service itself
    (``LETHE_SERVICE=1``) the unit is disabled without ``--now``: the running
    agent stops by itself once the home is withdrawn.  Returns the path of the
    file removed, or None.
    """
    p = plan(home, manager)
    if p.path is None:
        return None
    try:
        text = p.path.read_text("utf-8")
    except OSError:
        return None
    root = str(Path(home.root))
    ours = (f"--home {shlex.quote(root)} run" in text                      # the systemd unit's ExecStart
            or f"<string>--home</string>\n      <string>{_xml(root)}</string>" in text)  # the launchd plist
    if not ours:
        return None
    under_service = os.environ.get("LETHE_SERVICE") == "1"
    if p.manager != "none":
        for cmd in p.disable:
            with contextlib.suppress(OSError):  # no service manager command: the file goes all the same
                _run([c for c in cmd if not (under_service and c == "--now")], check=False)
    try:
        p.path.unlink()
    except OSError:
        return None
    if p.manager == "systemd":
        with contextlib.suppress(OSError):
            _run(["systemctl", "--user", "daemon-reload"], check=False)
    return str(p.path)


def _run(cmd, check=True):
    r = subprocess.run(cmd, capture_output=True, text=True)
    if check and r.returncode != 0:
        raise StateError(f"'{shlex.join(cmd)}' failed (exit {r.returncode}): {r.stderr.strip()}")
    return r


CAPTURE_MAX_BYTES = 1 << 20


def rotate_capture(path, max_bytes: int = CAPTURE_MAX_BYTES) -> bool:
    """Rotate what the service manager appends to (``logs/service.out``): copy to ``.1``, truncate.

    The manager holds the file open with ``O_APPEND``, so it cannot be renamed
    away; copy-and-truncate keeps one previous generation.  Returns whether it
    rotated.  The agent's own messages go to the rotating ``agent.log``.
    """
    import shutil

    path = Path(path)
    try:
        if path.is_symlink() or path.stat().st_size <= max_bytes:
            return False
        shutil.copyfile(path, path.with_name(path.name + ".1"))
        os.truncate(path, 0)
    except OSError:
        return False
    return True
