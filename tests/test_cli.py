"""The command line: every command documented, help works, exit codes as documented."""

from __future__ import annotations

import argparse
import subprocess
import sys

import pytest

from agent import errors
from agent.cli import build_parser, main


def _leaf_commands(parser, prefix="lethe"):
    for a in parser._actions:
        if isinstance(a, argparse._SubParsersAction):
            for name, sp in a.choices.items():
                full = f"{prefix} {name}"
                if any(isinstance(x, argparse._SubParsersAction) for x in sp._actions):
                    yield from _leaf_commands(sp, full)
                else:
                    yield full


def test_every_command_is_documented(repo):
    doc = (repo / "docs" / "cli.md").read_text()
    missing = [c for c in _leaf_commands(build_parser()) if f"### `{c}`" not in doc]
    assert not missing, f"add these to docs/cli.md: {missing}"


def test_help_runs_in_a_fresh_process():
    r = subprocess.run([sys.executable, "-m", "agent.cli", "--help"], capture_output=True, text=True)
    assert r.returncode == 0 and "demo" in r.stdout and "Exit codes" in r.stdout


def test_help_lists_every_exit_code(capsys):
    # The epilog of `lethe --help` names each code of agent.errors with its number.
    with pytest.raises(SystemExit):
        main(["--help"])
    text = " ".join(capsys.readouterr().out.split())
    for code, words in [(errors.EXIT_OK, "ok"), (errors.EXIT_FAILURE, "check failed"), (errors.EXIT_USAGE, "usage"),
                        (errors.EXIT_DATA, "bad data"), (errors.EXIT_INTEGRITY, "integrity"),
                        (errors.EXIT_STATE, "wrong state"), (errors.EXIT_BUDGET, "privacy budget")]:
        assert f"{code} {words}" in text


def test_bad_policy_exits_with_the_data_code(tmp_path, capsys, repo):
    bad = tmp_path / "p.toml"
    text = (repo / "policies" / "default.toml").read_text()
    bad.write_text(text.replace("raw_seconds = 30", "raw_secnds = 30"))
    assert main(["policy", "check", str(bad)]) == errors.EXIT_DATA
    out = capsys.readouterr().out
    assert "retention.raw_secnds" in out and "did you mean 'raw_seconds'" in out


def test_status_without_a_home_is_a_state_error(tmp_path, capsys):
    assert main(["--home", str(tmp_path / "none"), "status"]) == errors.EXIT_STATE
    assert "run 'lethe init' first" in capsys.readouterr().err


def test_unknown_command_is_a_usage_error():
    r = subprocess.run([sys.executable, "-m", "agent.cli", "frobnicate"], capture_output=True, text=True)
    assert r.returncode == errors.EXIT_USAGE
