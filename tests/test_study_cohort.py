"""``lethe study merge`` and ``lethe study report`` over several participants."""

from __future__ import annotations

import csv
import json

import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from scipy.stats import binomtest

from agent.study.card import make_enrolment
from agent.study.merge import merge
from agent.study.open import open_bundles
from agent.study.registry import enroll
from agent.study.report import report, wilson_interval

from _bundle_fixtures import PASS, Study, make_payload


@pytest.fixture
def cohort(tmp_path):
    s = Study(tmp_path)
    devices = {s.pseudonym: s.device}
    for name in ("pQ8rT3bb", "pZ1kW9cc"):
        key = Ed25519PrivateKey.generate()
        f = tmp_path / f"{name}.json"
        f.write_text(json.dumps(make_enrolment(s.card, s.policy, name, key)))
        enroll(s.dir, f)
        devices[name] = key
    paths = []
    for i, (name, key) in enumerate(devices.items()):
        for seq in (1, 2):
            paths.append(s.write(s.seal(make_payload(s.policy), seq=seq, device=key), f"{name}-{seq}.lethe"))
    open_bundles(s.dir, paths, PASS)
    return s


def read_csv(path):
    with open(path, newline="") as f:
        return list(csv.DictReader(f))


def test_merge_tables(cohort, tmp_path):
    out = merge(cohort.dir, tmp_path / "tables")
    edges = read_csv(out["edges"])
    assert {r["pseudonym"] for r in edges} == {"pX7QmN2a", "pQ8rT3bb", "pZ1kW9cc"}
    assert len(edges) == 3 * 2 * 21  # participants x bundles x type pairs
    latest = [r for r in read_csv(out["parameters"]) if r["latest"] == "True"]
    assert {r["seq"] for r in latest} == {"2"}
    comp = read_csv(out["compliance"])
    assert comp[0]["ledger_head_seq"] == "42" and comp[0]["violations"] == "0"


def test_wilson_interval_against_scipy():
    # scipy's binomtest Wilson interval; 9 of 18 is symmetric around 0.5.
    lo, hi = wilson_interval(9, 18)
    ci = binomtest(9, 18).proportion_ci(method="wilson")
    assert (lo, hi) == (ci.low, ci.high) and lo == pytest.approx(1 - hi)


def test_report_html_and_plots(cohort, tmp_path):
    page = report(cohort.dir, tmp_path / "report")
    text = page.read_text()
    for png in ("accuracy.png", "parameters.png", "coverage.png"):
        assert (tmp_path / "report" / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        assert f'src="{png}"' in text
    assert "http://" not in text and "https://" not in text  # no network resources
    assert "pZ1kW9cc" in text and "Compliance digest" in text


def test_merge_parquet_matches_csv(cohort, tmp_path):
    pq = pytest.importorskip("pyarrow.parquet", reason="pyarrow is optional; Parquet is written only when present")
    out = merge(cohort.dir, tmp_path / "tables")
    table = pq.read_table(out["edges.parquet"]).to_pylist()
    rows = read_csv(out["edges"])
    assert len(table) == len(rows)
    assert [str(r["count"]) if r["count"] is not None else "" for r in table] == [r["count"] for r in rows]
