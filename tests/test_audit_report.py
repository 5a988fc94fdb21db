"""``lethe audit report``: figures against an independent computation, self-containment, rendering."""

from __future__ import annotations

import datetime as dt
import json
import os
import re
import subprocess
from collections import Counter
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from agent.audit.report import write_report
from agent.cli import main
from test_audit_home import T0, build_home, ledger_exposures

CHROMIUM = Path("/usr/bin/chromium")
LATER = T0 + 30 * 86400


@pytest.fixture(scope="module")
def home(tmp_path_factory):
    return build_home(tmp_path_factory.mktemp("rep") / "home", items=120, days=4, seed=3, late=1,
                      rejections={"bad_header": 3, "too_large": 1, "wrong_rate": 2}, exports=3)


@pytest.fixture(scope="module")
def report(home, tmp_path_factory):
    out = tmp_path_factory.mktemp("out")
    return write_report(home, out, now=LATER)


@pytest.fixture(scope="module")
def figures(report):
    return json.loads((report.parent / "report.json").read_text("utf-8"))


def _entries(root):
    return [json.loads(line) for line in (Path(root) / "ledger.jsonl").read_text("utf-8").splitlines()]


def test_figures_name_their_format_and_version(figures):
    # report.json version 2: exposure statistics named with their unit (docs/audit.md)
    assert (figures["format"], figures["version"]) == ("lethe-audit-figures", 2)
    assert set(figures["exposure"]) == {"n", "median_s", "p95_s", "max_s"}


def test_exposure_matches_independent_computation(home, figures):
    xs = ledger_exposures(home)
    e = figures["exposure"]
    assert e["n"] == len(xs)
    # numpy's default percentile method is linear interpolation (Hyndman and Fan type 7).
    assert e["median_s"] == pytest.approx(float(np.median(xs)), abs=1e-9)
    assert e["p95_s"] == pytest.approx(float(np.percentile(xs, 95)), abs=1e-9)
    assert e["max_s"] == pytest.approx(float(xs.max()), abs=1e-9)


def test_exposure_figures_printed_in_page(home, report):
    xs = ledger_exposures(home)
    text = report.read_text("utf-8")
    for label, value in (("Exposure median", np.median(xs)), ("Exposure 95th percentile", np.percentile(xs, 95)),
                         ("Exposure maximum", xs.max())):
        assert f"<td>{label}</td><td>{value:.2f} s</td>" in text


def test_items_per_kind_per_day_match_ledger(home, figures):
    expect: dict = {}
    for e in _entries(home):
        if e["event"] == "received":
            day = dt.datetime.fromtimestamp(e["t"], dt.UTC).date().isoformat()
            expect.setdefault(day, Counter())[e["kind"]] += 1
    assert figures["daily"] == {d: dict(c) for d, c in expect.items()}


def test_rejections_match_ledger(home, figures):
    expect = Counter(e["reason"] for e in _entries(home) if e["event"] == "rejected")
    assert figures["rejections"] == dict(expect) == {"bad_header": 3, "too_large": 1, "wrong_rate": 2}


def test_exports_match_ledger(home, figures):
    expect = [e["t"] for e in _entries(home) if e["event"] == "exported"]
    assert [x["t"] for x in figures["exports"]] == expect and len(expect) == 3


def test_late_item_makes_report_fail(report, figures):
    assert figures["violations"] == 1 and figures["ok"] is False
    assert '<div class="verdict bad">FAILED: 1 retention violation(s).</div>' in report.read_text("utf-8")


def test_clean_home_report_passes(tmp_path):
    root = build_home(tmp_path / "h", items=10, days=1)
    page = write_report(root, tmp_path / "out", now=LATER).read_text("utf-8")
    assert '<div class="verdict ok">PASSED' in page


def test_pngs_written(report):
    for name in ("exposure.png", "items_per_day.png", "rejections.png", "exports.png"):
        data = (report.parent / name).read_bytes()
        # PNG signature, PNG specification (W3C, 2nd ed.) section 5.2.
        assert data[:8] == b"\x89PNG\r\n\x1a\n"


class _Refs(HTMLParser):
    def __init__(self):
        super().__init__()
        self.refs, self.tags = [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for k, v in attrs:
            if k in ("src", "href", "srcset", "poster", "data", "action") and v:
                self.refs.append(v)


def test_html_self_contained(report):
    text = report.read_text("utf-8")
    p = _Refs()
    p.feed(text)
    assert "script" not in p.tags and "link" not in p.tags and "iframe" not in p.tags
    assert not [r for r in p.refs if re.match(r"(?i)(https?:)?//", r)]
    assert not re.search(r"(?i)https?://", text)
    assert not re.search(r"(?i)@import|url\(", text)
    for r in p.refs:
        assert (report.parent / r).is_file(), f"{r} referenced but not written"


def test_page_has_policy_summary_fingerprint_and_cautions(home, report):
    from agent.policy import load_policy

    text = report.read_text("utf-8")
    fp = load_policy(Path(home) / "policy.toml").fingerprint
    assert fp in text
    for needle in ("What is collected", "What leaves your laptop", "NIST SP 800-88", "informed consent",
                   "Integrity checks", "What this report cannot show"):
        assert needle in text


def test_page_names_no_content(home, report):
    # Item ids (keyed MACs) may appear in violation lines; paths on the device never.
    text = report.read_text("utf-8")
    assert str(home) not in text and "/inbox/" not in text and "/tmp/" not in text


def test_cli_report(home, tmp_path, capsys):
    out = tmp_path / "cli-out"
    # This home has one retention violation: the exit code follows the verdict (issue 12), as for verify.
    assert main(["audit", "report", "--out", str(out), "--home", str(home)]) == 1
    assert (out / "index.html").is_file()
    assert str(out / "index.html") in capsys.readouterr().out


@pytest.mark.skipif(not CHROMIUM.exists(),
                    reason="headless rendering needs Debian's chromium at /usr/bin/chromium "
                           "(apt-get install chromium)")
def test_renders_in_headless_chromium(report, tmp_path):
    shot = tmp_path / "report.png"
    cmd = [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
           "--disable-component-update", "--disable-sync", "--no-first-run",
           f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", "--window-size=1200,2000",
           report.resolve().as_uri()]
    env = {**os.environ, "HOME": str(tmp_path)}
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=120, env=env)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    import matplotlib.image as mpimg

    img = mpimg.imread(shot)
    assert img.shape[:2] == (2000, 1200)
    # Not a blank page: the verdict banner's red and plenty of dark text pixels.
    rgb = img[..., :3]
    assert (rgb.mean(axis=2) < 0.3).mean() > 0.005
    red = (rgb[..., 0] > 0.6) & (rgb[..., 1] < 0.3) & (rgb[..., 2] < 0.3)
    assert red.any()
