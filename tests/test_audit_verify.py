"""``lethe audit verify``: exit codes, wording and the passphrase-free copy."""

from __future__ import annotations

import json
import shutil

import pytest

from agent.audit.verify import verify_home
from agent.cli import main
from agent.errors import EXIT_FAILURE, EXIT_INTEGRITY, EXIT_OK
from agent.policy import bundled_policy_path
from test_audit_home import T0, build_home

LATER = T0 + 30 * 86400  # judge time: well after every simulated item


@pytest.fixture(scope="module")
def clean(tmp_path_factory):
    return build_home(tmp_path_factory.mktemp("clean") / "home", items=40, days=2, seed=1)


@pytest.fixture
def copy(clean, tmp_path):
    """A fresh copy of the clean home for tests that damage it."""
    dst = tmp_path / "copy"
    shutil.copytree(clean, dst)
    return dst


def _lines(root):
    return (root / "ledger.jsonl").read_bytes().splitlines(keepends=True)


def test_clean_home_passes(clean):
    res = verify_home(clean, now=LATER)
    assert res.exit_code == EXIT_OK
    assert res.text().splitlines()[2].startswith("PASSED")
    assert all(ok for _, ok in res.checks())


def test_counts_per_kind(clean):
    res = verify_home(clean, now=LATER)
    rows = {r["kind"]: r for r in res.kind_rows()}
    # 40 items + 3 rejected, cycled over four kinds by the builder.
    assert sum(r["received"] for r in rows.values()) == 43
    assert sum(r["destroyed"] for r in rows.values()) == 43
    assert sum(r["rejected"] for r in rows.values()) == 3


def test_late_destruction_fails_with_exit_1(tmp_path):
    root = build_home(tmp_path / "h", items=20, days=1, late=1)
    res = verify_home(root, now=LATER)
    assert res.exit_code == EXIT_FAILURE
    assert res.integrity_ok and not res.retention_ok
    assert "Retention violations (1)" in res.text()
    assert "limit 30 s" in res.report.violations[0]["message"]


def test_never_destroyed_fails_with_exit_1(tmp_path):
    root = build_home(tmp_path / "h", items=20, days=1, never_destroyed=1)
    res = verify_home(root, now=LATER)
    assert res.exit_code == EXIT_FAILURE
    assert res.report.violations[0]["check"] == "not_destroyed"


def _append_received(root, complete_at):
    from agent.keystore import Keystore
    from agent.ledger import Ledger

    ks = Keystore(root, use_keyring=False)
    Ledger(root, signing_key=ks.device_key(), clock=lambda: complete_at + 0.05).append(
        "received", item="ab" * 16, kind="audio", bytes=100, complete_at=complete_at)


def test_item_inside_raw_window_is_pending(copy):
    _append_received(copy, LATER)
    res = verify_home(copy, now=LATER + 5.0)  # 5 s old; the default policy allows 30 s
    assert res.exit_code == EXIT_OK
    assert "Pending: 1 item(s)" in res.text()


def test_item_past_raw_window_is_violation(copy):
    _append_received(copy, LATER)
    res = verify_home(copy, now=LATER + 31.0)
    assert res.exit_code == EXIT_FAILURE
    assert res.report.violations[0]["check"] == "not_destroyed"


def test_edited_entry_is_integrity_failure(copy):
    lines = _lines(copy)
    i = next(k for k, line in enumerate(lines) if b'"received"' in line)
    lines[i] = lines[i].replace(b'"bytes":1', b'"bytes":9', 1)
    (copy / "ledger.jsonl").write_bytes(b"".join(lines))
    res = verify_home(copy, now=LATER)
    assert res.exit_code == EXIT_INTEGRITY
    assert ("entry hashes", False) in res.checks()


def test_deleted_entry_is_integrity_failure(copy):
    lines = _lines(copy)
    del lines[10]
    (copy / "ledger.jsonl").write_bytes(b"".join(lines))
    res = verify_home(copy, now=LATER)
    assert res.exit_code == EXIT_INTEGRITY
    assert "entry 10 missing" in res.text()


def test_reordered_entries_are_integrity_failure(copy):
    lines = _lines(copy)
    lines[10], lines[11] = lines[11], lines[10]
    (copy / "ledger.jsonl").write_bytes(b"".join(lines))
    assert verify_home(copy, now=LATER).exit_code == EXIT_INTEGRITY


def test_truncated_ledger_is_integrity_failure(copy):
    data = (copy / "ledger.jsonl").read_bytes()
    (copy / "ledger.jsonl").write_bytes(data[:-40])
    res = verify_home(copy, now=LATER)
    assert res.exit_code == EXIT_INTEGRITY
    assert ("no truncation", False) in res.checks()


def test_rollback_to_older_copy_is_integrity_failure(copy):
    lines = _lines(copy)
    (copy / "ledger.jsonl").write_bytes(b"".join(lines[:-5]))  # older copy, current anchor kept
    res = verify_home(copy, now=LATER)
    assert res.exit_code == EXIT_INTEGRITY
    assert ("rollback anchor", False) in res.checks()


def test_missing_ledger_is_integrity_failure(copy):
    (copy / "ledger.jsonl").unlink()
    res = verify_home(copy, now=LATER)
    assert res.exit_code == EXIT_INTEGRITY
    assert ("ledger present", False) in res.checks()


def test_policy_swapped_in_home_is_a_failure(copy):
    text = bundled_policy_path("default").read_text("utf-8").replace("folds = 5", "folds = 6")
    (copy / "policy.toml").write_text(text, "utf-8")
    res = verify_home(copy, now=LATER)
    assert res.exit_code == EXIT_FAILURE
    assert "is not the policy the agent last recorded" in res.policy_findings[0]["message"]


def test_verifies_copy_without_passphrase(tmp_path):
    # The participant's home uses a passphrase; the board's copy holds only
    # the ledger, its anchor, the policy and keys/device.pub.
    root = build_home(tmp_path / "home", items=12, days=1, passphrase=b"participant secret")
    board = tmp_path / "board-copy"
    board.mkdir()
    for name in ("ledger.jsonl", "ledger.head", "policy.toml"):
        shutil.copy(root / name, board / name)
    (board / "keys").mkdir()
    shutil.copy(root / "keys" / "device.pub", board / "keys" / "device.pub")
    res = verify_home(board, now=LATER)
    assert res.exit_code == EXIT_OK, res.text()


def test_other_device_key_fails_signatures(copy, tmp_path):
    other = build_home(tmp_path / "other", items=1, days=1)
    shutil.copy(other / "keys" / "device.pub", copy / "keys" / "device.pub")
    res = verify_home(copy, now=LATER)
    assert res.exit_code == EXIT_INTEGRITY
    assert ("signatures (device key)", False) in res.checks()


def test_cli_verify_json(clean, capsys):
    # The CLI judges pending items at the real clock; every simulated item is destroyed.
    rc = main(["audit", "verify", "--home", str(clean), "--json"])
    out = json.loads(capsys.readouterr().out)
    assert rc == EXIT_OK and out["ok"] is True and out["exit_code"] == 0
    assert out["ledger"]["exposure"]["n"] == 43
    assert "exposures" not in out["ledger"]


def test_cli_verify_json_names_exposure_with_units(clean, capsys):
    # the same names as lethe status and the board's report.json (agent.stats.exposure_summary)
    main(["audit", "verify", "--home", str(clean), "--json"])
    out = json.loads(capsys.readouterr().out)
    assert set(out["ledger"]["exposure"]) == {"n", "median_s", "p95_s", "max_s"}


def test_cli_verify_exit_code_on_tamper(copy, capsys):
    lines = _lines(copy)
    del lines[5]
    (copy / "ledger.jsonl").write_bytes(b"".join(lines))
    assert main(["audit", "verify", "--home", str(copy)]) == EXIT_INTEGRITY
    assert "FAILED" in capsys.readouterr().out


def test_cli_verify_uses_global_home(clean, capsys):
    assert main(["--home", str(clean), "audit", "verify"]) == EXIT_OK
