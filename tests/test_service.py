"""Background service files: systemd user unit and launchd agent."""

from __future__ import annotations

import plistlib
import shutil
import subprocess

import pytest

from agent.participant import service


def test_systemd_unit_runs_the_agent_with_low_priority(home):
    p = service.plan(home, manager="systemd", command=["/opt/lethe/bin/lethe"])
    assert "ExecStart=/opt/lethe/bin/lethe --home" in p.content and p.content.rstrip().endswith("default.target")
    for line in ("Restart=on-failure", "Nice=15", "IOSchedulingClass=idle", "CPUSchedulingPolicy=idle"):
        assert line in p.content
    assert p.enable[-1] == ["systemctl", "--user", "enable", "--now", service.UNIT_NAME]


@pytest.mark.skipif(shutil.which("systemd-analyze") is None,
                    reason="systemd-analyze is not installed on this machine, so the unit cannot be verified")
def test_systemd_unit_passes_systemd_analyze_verify(home, tmp_path):
    # systemd-analyze verify (systemd's own checker) must accept the unit we write.
    exe = tmp_path / "lethe"
    exe.write_text("#!/bin/sh\nexit 0\n")
    exe.chmod(0o755)
    p = service.plan(home, manager="systemd", command=[str(exe)])
    unit = tmp_path / service.UNIT_NAME
    unit.write_text(p.content)
    # The user manager is often unavailable (containers, CI), so verify in system
    # mode, which checks the same unit-file syntax and directives.
    ours = _verify(unit)
    assert not ours, "\n".join(ours)
    # and the checker does catch a misspelt directive, so the assertion above can fail
    unit.write_text(p.content.replace("Nice=15", "Nicety=15"))
    assert any("Nicety" in line for line in _verify(unit))


def _verify(unit):
    r = subprocess.run(["systemd-analyze", "verify", str(unit)], capture_output=True, text=True)
    return [line for line in (r.stdout + r.stderr).splitlines() if unit.name in line]


def test_launchd_plist_is_a_valid_property_list(home):
    # plistlib (Python standard library) parses Apple's XML property list format.
    p = service.plan(home, manager="launchd", command=["/Applications/lethe/bin/lethe"])
    d = plistlib.loads(p.content.encode())
    assert d["Label"] == service.LAUNCHD_LABEL
    assert d["ProgramArguments"][-1] == "run" and d["ProgramArguments"][0] == "/Applications/lethe/bin/lethe"
    assert d["LowPriorityIO"] is True and d["KeepAlive"] == {"SuccessfulExit": False}
    assert d["Umask"] == 0o077


def test_dry_run_writes_nothing(home, tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path / "cfg"))
    p = service.install(home, dry_run=True, manager="systemd")
    assert not p.path.exists()
    assert "systemctl --user enable --now" in p.describe()


def test_no_service_manager_is_a_clear_error(home, tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path / "cfg"))
    from agent.errors import StateError

    with pytest.raises(StateError, match="--dry-run"):
        service.install(home, manager="none")


def test_systemd_unit_has_no_ordering_cycle_and_no_dangling_documentation(home):
    # systemd.unit(5): a unit WantedBy=default.target that is also After=default.target
    # orders itself after the target that pulls it in (an ordering cycle).
    p = service.plan(home, manager="systemd", command=["/opt/lethe/bin/lethe"])
    assert "WantedBy=default.target" in p.content
    assert "After=default.target" not in p.content
    assert "Documentation=" not in p.content


def test_the_unit_runs_the_console_script_beside_this_interpreter(home):
    import sys
    from pathlib import Path

    cmd = service.lethe_command()
    beside = Path(sys.executable).absolute().parent / "lethe"
    if beside.exists():
        assert cmd == [str(beside)]
    else:  # not an installed environment: this very interpreter runs the package
        assert cmd[-2:] == ["-m", "agent.cli"] or Path(cmd[0]).name == "lethe"


def test_launchd_uses_bootstrap_and_bootout(home):
    import os

    p = service.plan(home, manager="launchd", command=["/x/lethe"])
    assert p.enable == [["launchctl", "bootstrap", f"gui/{os.getuid()}", str(p.path)]]
    assert p.disable == [["launchctl", "bootout", f"gui/{os.getuid()}/{service.LAUNCHD_LABEL}"]]


@pytest.mark.skipif(shutil.which("systemctl") is None, reason="systemctl is not installed")
def test_failed_install_explains_and_leaves_nothing(home, tmp_path, monkeypatch):
    # The real systemctl, with no user bus reachable (an empty runtime directory and no
    # session bus address): it fails as it does over ssh or in a container.
    from agent.errors import StateError

    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path / "cfg"))
    monkeypatch.setenv("XDG_RUNTIME_DIR", str(tmp_path / "run"))
    (tmp_path / "run").mkdir()
    monkeypatch.delenv("DBUS_SESSION_BUS_ADDRESS", raising=False)
    with pytest.raises(StateError) as e:
        service.install(home, manager="systemd")
    msg = str(e.value)
    assert "no systemd user manager" in msg and "lethe run" in msg and "Nothing was installed" in msg
    assert not (tmp_path / "cfg" / "systemd").exists()
