"""``lethe study merge`` and ``lethe study report`` over several participants."""

from __future__ import annotations

import csv
import json

import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from agent.study.card import make_enrolment
from agent.study.merge import merge
from agent.study.open import open_bundles
from agent.study.registry import enroll
from agent.study.report import report

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
    for name, key in devices.items():
        for seq in (1, 2):
            paths.append(s.write(s.seal(make_payload(s.policy), seq=seq, device=key), f"{name}-{seq}.lethe"))
    open_bundles(s.dir, paths, PASS)
    return s


def read_csv(path):
    with open(path, newline="") as f:
        return list(csv.DictReader(f))


def test_merge_tables(cohort, tmp_path):
    out = merge(cohort.dir, tmp_path / "tables")
    pairs = read_csv(out["pair_counts"])
    assert {r["pseudonym"] for r in pairs} == {"pX7QmN2a", "pQ8rT3bb", "pZ1kW9cc"}
    assert len(pairs) == 3 * 2 * 21  # participants x bundles x type pairs
    latest = [r for r in read_csv(out["parameters"]) if r["latest"] == "True"]
    assert {r["seq"] for r in latest} == {"2"}
    comp = read_csv(out["compliance"])
    assert comp[0]["ledger_head_seq"] == "42" and comp[0]["violations"] == "0"
    assert len(read_csv(out["participants"])) == 3


def test_merge_edge_table_lists_edges(cohort, tmp_path):
    # Each row is one edge of the bundle's edge list, as node ids; compared with the payload itself.
    out = merge(cohort.dir, tmp_path / "tables")
    edges = [r for r in read_csv(out["edges"]) if r["pseudonym"] == "pX7QmN2a" and r["seq"] == "1"]
    stored = json.loads((cohort.dir / "received" / "pX7QmN2a" / "1.json").read_text())
    el = stored["payload"]["edge_list"]
    want = sorted((el["nodes"][i], el["nodes"][j]) for i, j in el["edges"])
    assert sorted((r["source"], r["target"]) for r in edges) == want and len(want) > 21


def test_merge_data_dictionary_describes_every_column(cohort, tmp_path):
    out = merge(cohort.dir, tmp_path / "tables")
    dd = read_csv(out["data_dictionary"])
    for table, path in out.items():
        if table == "data_dictionary":
            continue
        with open(path, newline="") as f:
            header = next(csv.reader(f))
        described = [r["column"] for r in dd if r["table"] == table]
        assert header == described, table
    assert all(r["description"] for r in dd)


def test_merge_leaves_out_withdrawn(cohort, tmp_path):
    from agent.study.withdrawal import make_withdrawal_certificate, register_withdrawal, write_withdrawal_certificate

    cert = make_withdrawal_certificate("harbour-days-2027", cohort.pseudonym, cohort.device,
                                       {"seq": 9, "hash": "ab" * 32}, {"episodes": 60})
    register_withdrawal(cohort.dir, write_withdrawal_certificate(tmp_path / "w.json", cert))
    out = merge(cohort.dir, tmp_path / "tables")
    for t in ("participants", "pair_counts", "edges", "parameters", "coverage", "compliance"):
        assert cohort.pseudonym not in {r["pseudonym"] for r in read_csv(out[t])}, t
    page = report(cohort.dir, tmp_path / "report").read_text()
    assert "pZ1kW9cc" in page


def test_report_html_and_plots(cohort, tmp_path):
    page = report(cohort.dir, tmp_path / "report")
    text = page.read_text()
    for png in ("accuracy.png", "parameters.png", "coverage.png"):
        assert (tmp_path / "report" / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        assert f'src="{png}"' in text
    assert "http://" not in text and "https://" not in text  # no network resources
    assert "pZ1kW9cc" in text and "Compliance digest" in text
