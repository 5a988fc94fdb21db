"""After a withdrawal: the background service is gone, 'lethe run' refuses plainly, the certificate is sent once."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

from agent.cli import main
from agent.participant import service
from agent.participant.withdraw import withdraw

from _server_fixtures import ThreadServer, free_port
from intake_samples import REPO
from test_bundle_export import make_world
from test_uploader import enrolment_file, with_server_card

STUDY = "harbour-days-2027"


@pytest.fixture
def no_service_manager(tmp_path, monkeypatch):
    """Units go under a temporary XDG_CONFIG_HOME, and no systemctl is on PATH (this user's manager is left alone)."""
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path / "config"))
    bare = tmp_path / "bin"
    bare.mkdir()
    monkeypatch.setenv("PATH", str(bare))
    assert service.detect_manager() == "none"
    return tmp_path / "config" / "systemd" / "user" / service.UNIT_NAME


def _world(tmp_path):
    home, study = make_world(tmp_path)
    home.write_config({**home.read_config(), "study_id": STUDY})
    return home, study


def _write_unit(path, home_root):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(service.systemd_unit(home_root, ["/usr/bin/lethe"]))


def test_withdrawal_removes_this_homes_service_unit(tmp_path, no_service_manager):
    home, _ = _world(tmp_path)
    _write_unit(no_service_manager, home.root)
    res = withdraw(home)
    assert res["service_removed"] == str(no_service_manager) and not no_service_manager.exists()


def test_withdrawal_leaves_another_homes_unit_alone(tmp_path, no_service_manager):
    home, _ = _world(tmp_path)
    _write_unit(no_service_manager, tmp_path / "someone-else")
    assert withdraw(home)["service_removed"] is None and no_service_manager.exists()


def test_withdrawal_without_a_unit_says_nothing_about_one(tmp_path, no_service_manager, capsys):
    home, _ = _world(tmp_path)
    assert main(["--home", str(home.root), "withdraw", "--yes"]) == 0
    out = capsys.readouterr().out
    assert "background service" not in out and "Send this signed note" in out


def test_run_on_a_withdrawn_home_exits_with_the_state_code_and_no_traceback(tmp_path, no_service_manager):
    from agent.errors import EXIT_STATE

    home, _ = _world(tmp_path)
    withdraw(home)
    r = subprocess.run([sys.executable, "-m", "agent.cli", "--home", str(home.root), "run", "--once"],
                       env={**os.environ, "PYTHONPATH": str(REPO)}, capture_output=True, text=True, timeout=120)
    assert r.returncode == EXIT_STATE, r.stderr
    assert "was withdrawn from the study" in r.stderr and "Traceback" not in r.stderr


def test_withdraw_sends_the_certificate_to_the_study_server_once(tmp_path, no_service_manager, capsys):
    from agent.uploader import Uploader

    home, study = _world(tmp_path)
    srv = ThreadServer(study, f"sqlite:///{tmp_path / 'server.db'}")
    try:
        with_server_card(home, study, srv.url, srv.pin, tmp_path)
        enrolment_file(home, study)
        up = Uploader(home)
        up.enqueue_enrolment(srv.ctx.store.invite(1)[0])
        assert up.run_once()["sent"] == 1
        assert main(["--home", str(home.root), "withdraw", "--yes", "--json"]) == 0
        res = json.loads(capsys.readouterr().out)
        assert res["upload"] == "sent" and res["signed"] is True
        assert srv.ctx.store.counts()["withdrawn"] == 1
    finally:
        srv.stop()


def test_withdraw_with_the_server_unreachable_gives_the_command_to_send_it_later(tmp_path, no_service_manager,
                                                                                  capsys):
    home, study = _world(tmp_path)
    url, pin = f"https://127.0.0.1:{free_port()}", "ab" * 32  # nothing listens on that port
    with_server_card(home, study, url, pin, tmp_path)
    assert main(["--home", str(home.root), "withdraw", "--yes"]) == 0
    out = capsys.readouterr().out
    cert = home.root / "withdrawal-certificate.json"
    assert f"The study server {url} could not be reached" in out
    assert f"lethe upload --withdrawal {cert} --server {url} --pin {pin}" in out
    assert sorted(p.name for p in home.root.iterdir()) == [cert.name]


def test_study_verify_withdrawal_refuses_an_unsigned_record(tmp_path, capsys):
    from agent.errors import EXIT_INTEGRITY
    from agent.study.withdrawal import make_unsigned_withdrawal, write_withdrawal_certificate

    _, study = _world(tmp_path)
    rec = write_withdrawal_certificate(tmp_path / "withdrawal-unsigned.json", make_unsigned_withdrawal(
        STUDY, "pX7QmN2a", None, None, {"inbox_files": 1}, "the OS keyring is locked"))
    assert main(["study", "verify-withdrawal", "--dir", str(study), str(rec)]) == EXIT_INTEGRITY
    err = capsys.readouterr().err
    assert "UNSIGNED withdrawal record" in err and "the OS keyring is locked" in err
    assert not (study / "withdrawals").exists() or not list((study / "withdrawals").iterdir())



def test_a_launchd_agent_for_this_home_is_removed(tmp_path, no_service_manager, monkeypatch):
    # macOS cannot run here: the plist is written where launchd would read it (HOME points into tmp_path) and
    # launchctl is not on PATH, so only the file's removal is checked
    monkeypatch.setenv("HOME", str(tmp_path / "user"))
    home, _ = _world(tmp_path)
    p = service.plan(home, "launchd")
    p.path.parent.mkdir(parents=True)
    p.path.write_text(p.content)
    assert service.remove_installed(home, "launchd") == str(p.path) and not p.path.exists()
