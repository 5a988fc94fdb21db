"""``lethe demo`` end to end on a short run: every stage, every role, nothing left behind."""

from __future__ import annotations

import io
import json
from pathlib import Path

import pytest

from agent.errors import UsageError


@pytest.mark.slow
def test_two_day_demo_runs_every_stage(tmp_path):
    from agent.demo.run import run_demo
    from agent.ledger import verify_ledger

    out = io.StringIO()
    facts = run_demo(tmp_path / "work", days=2, seed=11, out=out)
    text = out.getvalue()
    for stage in ("Researcher: study keys", "Participant: enrolment", "Recorder and agent",
                  "codebook, hourly episodes", "previewing and sending", "Researcher: opening",
                  "Ethics board", "status at the end"):
        assert stage in text
    home = tmp_path / "work" / "home"
    assert list((home / "inbox").iterdir()) == []
    assert facts["audit_ok"] is True and facts["episodes"] == 48
    rep = verify_ledger(home)
    assert rep.ok and rep.counts["received"] == rep.counts["destroyed"] > 0
    # the researcher holds exactly one opened bundle from this participant
    received = list((tmp_path / "work" / "study" / "received").rglob("*.json"))
    assert len(received) == 1
    payload = json.loads(received[0].read_text())["payload"]
    from agent.policy import bundled_policy_path, load_policy

    assert payload["policy_fingerprint"] == load_policy(bundled_policy_path("default")).fingerprint
    assert "truth" not in json.dumps(payload)  # the generator's ground truth never leaves
    assert (tmp_path / "work" / "audit-report" / "index.html").exists()
    # the agent uploaded the enrolment and the bundle to the demo's study server; the dashboard shows them
    assert facts["server_counts"]["enrolled"] == 1 and facts["server_counts"]["bundles"] == 1
    assert facts["dashboard_ok"] is True and facts["dashboard"] in text
    assert facts["uploaded"] == [Path(facts["bundle"]).name]
    # the closing status agrees with the upload queue: the one bundle is sent, none is left "prepared"
    assert "Summaries for the study: 1 made (1 sent, 0 prepared and waiting)" in text
    assert "sent (the server confirmed it has them), 0 prepared and waiting" in text  # enrolment + bundle
    # the server is stopped when the demo returns: the closing lines say so instead of offering a dead link
    assert "study server stops now" in text and "'lethe demo --serve'" in text


def test_demo_refuses_a_used_directory(tmp_path):
    from agent.demo.run import run_demo

    (tmp_path / "keep.txt").write_text("mine")
    with pytest.raises(UsageError, match="must be new or empty"):
        run_demo(tmp_path, days=1, out=io.StringIO())
    assert (tmp_path / "keep.txt").read_text() == "mine"


def test_demo_needs_at_least_one_day(tmp_path):
    from agent.demo.run import run_demo

    with pytest.raises(UsageError, match="--days must be at least 1"):
        run_demo(tmp_path / "w", days=0, out=io.StringIO())
