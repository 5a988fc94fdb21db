"""``lethe audit report --from-bundles``: the cohort view from opened bundles' ledger digests.

Opened bundles are written here in the researcher side's layout
(``STUDYDIR/received/<pseudonym>/<seq>.json``, ``{"header", "payload"}``), with
digests made by the real :func:`agent.ledger.digest` from real signed ledgers.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from agent.audit.cohort import cohort_view, write_cohort_report
from agent.cli import main
from agent.errors import DataError
from agent.ledger import digest, verify_ledger
from agent.policy import bundled_policy_path, load_policy
from test_audit_home import T0, build_home, ledger_exposures

LATER = T0 + 30 * 86400
DEFAULT_FP = load_policy(bundled_policy_path("default")).fingerprint


def _store(study, pseudonym, seq, dig, fp=DEFAULT_FP, created="2026-09-22"):
    p = Path(study, "received", pseudonym)
    p.mkdir(parents=True, exist_ok=True)
    doc = {"header": {"seq": seq, "created": created, "study_id": "harbour-days-2027"},
           "payload": {"schema": 1, "created": created, "policy_fingerprint": fp, "ledger_digest": dig}}
    (p / f"{seq}.json").write_text(json.dumps(doc), "utf-8")


@pytest.fixture(scope="module")
def homes(tmp_path_factory):
    base = tmp_path_factory.mktemp("cohort")
    return {"P01": build_home(base / "p1", items=30, days=2, seed=11),
            "P02": build_home(base / "p2", items=30, days=2, seed=12),
            "P03": build_home(base / "p3", items=30, days=2, seed=13, late=1)}


@pytest.fixture(scope="module")
def digests(homes):
    return {p: digest(verify_ledger(h, now=LATER)) for p, h in homes.items()}


@pytest.fixture
def study(tmp_path, digests):
    s = tmp_path / "study"
    for p, d in digests.items():
        _store(s, p, 1, d)
    return s


def test_digest_exposure_matches_independent_computation(homes, digests, study, tmp_path):
    # The digest the device sends, and the cohort page built on it, agree with
    # numpy over destroyed.t - received.complete_at from the ledger lines.
    out = write_cohort_report(study, tmp_path / "out")
    figs = {p["pseudonym"]: p for p in json.loads((out.parent / "report.json").read_text())["participants"]}
    for p, h in homes.items():
        xs = ledger_exposures(h)
        d = figs[p]["digest"]
        assert d["median_exposure_s"] == pytest.approx(float(np.median(xs)), abs=1e-9)
        assert d["p95_exposure_s"] == pytest.approx(float(np.percentile(xs, 95)), abs=1e-9)
        assert d["max_exposure_s"] == pytest.approx(float(xs.max()), abs=1e-9)


def test_participant_with_violation_fails(study):
    view = {p.pseudonym: p for p in cohort_view(study)}
    assert view["P01"].ok and view["P02"].ok
    assert not view["P03"].ok
    assert view["P03"].checks["violations"][0] is False
    assert view["P03"].checks["max_exposure"][0] is False


def test_head_going_backwards_fails(study, digests):
    older = json.loads(json.dumps(digests["P01"]))
    older["head"]["seq"] -= 10  # a later bundle from a rolled-back ledger
    _store(study, "P01", 2, older)
    p = {p.pseudonym: p for p in cohort_view(study)}["P01"]
    assert p.checks["head"][0] is False and "head" in p.checks["head"][1]


def test_unknown_policy_limit_not_checked(study, digests):
    _store(study, "P02", 1, digests["P02"], fp="ab" * 32)
    p = {p.pseudonym: p for p in cohort_view(study)}["P02"]
    assert p.checks["max_exposure"][0] is None
    assert p.ok  # not checked is not a failure; the device's own violation count still is


def test_card_approval_checked(study):
    (study / "card.json").write_text(json.dumps({"approved_policies": ["cd" * 32]}), "utf-8")
    p = {p.pseudonym: p for p in cohort_view(study)}["P01"]
    assert p.checks["approved"] == (False, "NOT on the study card")


def test_enrolment_policy_checked(study):
    reg = {"devices": {"P01": {"policy_fingerprint": "ef" * 32}}}
    (study / "registry.json").write_text(json.dumps(reg), "utf-8")
    p = {p.pseudonym: p for p in cohort_view(study)}["P01"]
    assert p.checks["enrolled_policy"][0] is False


def test_report_page(study, tmp_path):
    path = write_cohort_report(study, tmp_path / "out")
    text = path.read_text("utf-8")
    assert "FAILED: 1 of 3 participant(s)" in text
    assert not [m for m in ("http://", "https://", "<script") if m in text]
    for name in ("cohort_exposure.png", "cohort_items.png"):
        assert (path.parent / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG spec section 5.2


def test_no_received_dir_is_data_error(tmp_path):
    with pytest.raises(DataError, match="no opened bundles"):
        cohort_view(tmp_path)


def test_damaged_received_file_is_data_error(tmp_path):
    p = tmp_path / "received" / "P09"
    p.mkdir(parents=True)
    (p / "1.json").write_text('{"header": {}, "payload": {}}', "utf-8")
    with pytest.raises(DataError, match="not an opened bundle with a ledger digest"):
        cohort_view(tmp_path)


def test_cli_from_bundles(study, tmp_path, capsys):
    out = tmp_path / "cli"
    rc = main(["audit", "report", "--out", str(out), "--from-bundles", str(study),
               "--policy", str(bundled_policy_path("strict"))])
    assert (out / "index.html").is_file()
    # The exit code follows the verdict (issue 12): 0 only when the report passes.
    ok = json.loads((out / "report.json").read_text())["ok"]
    assert rc == (0 if ok else 1)
