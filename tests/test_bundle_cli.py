"""The ``lethe export`` and ``lethe study open|merge|report`` commands (thin wrappers)."""

from __future__ import annotations

import json

from agent.cli import main
from agent.errors import EXIT_INTEGRITY, EXIT_USAGE

from _bundle_fixtures import PASS
from test_bundle_export import make_world


def test_export_preview_text_writes_nothing(tmp_path, capsys):
    home, _ = make_world(tmp_path)
    assert main(["--home", str(home.root), "export", "--preview"]) == 0
    out = capsys.readouterr().out
    assert "This export would send the study 'harbour-days-2027'" in out
    assert list(home.outbox.iterdir()) == []


def test_export_preview_json_is_the_payload(tmp_path, capsys):
    home, _ = make_world(tmp_path)
    assert main(["--home", str(home.root), "export", "--preview", "--json"]) == 0
    payload = json.loads(capsys.readouterr().out)
    assert payload["schema"] == 2 and payload["study_id"] == "harbour-days-2027"


def test_export_needs_confirmation_without_a_terminal(tmp_path, capsys, monkeypatch):
    import io

    monkeypatch.setattr("sys.stdin", io.StringIO(""))
    home, _ = make_world(tmp_path)
    assert main(["--home", str(home.root), "export"]) == EXIT_USAGE
    assert "confirm each export" in capsys.readouterr().err
    assert list(home.outbox.iterdir()) == []


def test_export_yes_then_open_merge_report(tmp_path, capsys):
    home, study = make_world(tmp_path)
    assert main(["--home", str(home.root), "export", "--yes", "--json"]) == 0
    bundle = json.loads(capsys.readouterr().out)["bundle"]
    pf = tmp_path / "pass"
    pf.write_bytes(PASS + b"\n")
    assert main(["study", "open", "--dir", str(study), "--passphrase-file", str(pf), bundle]) == 0
    assert "ok, pX7QmN2a #1" in capsys.readouterr().out
    assert main(["study", "merge", "--dir", str(study), "--out", str(tmp_path / "t")]) == 0
    assert (tmp_path / "t" / "edges.csv").exists()
    assert main(["study", "report", "--dir", str(study), "--out", str(tmp_path / "r")]) == 0
    assert (tmp_path / "r" / "report.html").exists()


def test_open_tampered_exit_code_and_message(tmp_path, capsys):
    home, study = make_world(tmp_path)
    assert main(["--home", str(home.root), "export", "--yes"]) == 0
    bundle = next(home.outbox.iterdir())
    data = bytearray(bundle.read_bytes())
    data[-1] ^= 1
    bad = tmp_path / "bad.lethe"
    bad.write_bytes(bytes(data))
    pf = tmp_path / "pass"
    pf.write_bytes(PASS)
    capsys.readouterr()
    assert main(["study", "open", "--dir", str(study), "--passphrase-file", str(pf), str(bad)]) == EXIT_INTEGRITY
    assert "Ed25519 signature does not verify" in capsys.readouterr().err
    assert not (study / "received").exists()


def _spawn_export(home):
    import sys

    import pexpect

    return pexpect.spawn(sys.executable, ["-m", "agent.cli", "--home", str(home.root), "export"],
                         encoding="utf-8", timeout=120)


def test_export_asks_in_a_terminal_and_prepares_on_yes(tmp_path):
    home, _ = make_world(tmp_path)
    child = _spawn_export(home)
    child.expect(r"This export would send the study")
    child.expect(r"Seal this for the study and put it in the outbox\? lethe does not send it itself")
    child.expect(r"\[y/N\]")
    child.sendline("y")
    child.expect("Prepared pX7QmN2a-000001.lethe")
    child.expect("It has not been sent")
    child.expect(pexpect_eof())
    assert [p.name for p in home.outbox.iterdir()] == ["pX7QmN2a-000001.lethe"]


def test_export_in_a_terminal_declined(tmp_path):
    home, _ = make_world(tmp_path)
    child = _spawn_export(home)
    child.expect(r"\[y/N\]")
    child.sendline("")
    child.expect("Declined: nothing was prepared")
    child.expect(pexpect_eof())
    assert list(home.outbox.iterdir()) == []


def pexpect_eof():
    import pexpect

    return pexpect.EOF
