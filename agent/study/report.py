"""``lethe study report``: one self-contained HTML page with PNG plots of the cohort.

Sections: per-participant memory-test accuracy against chance and the
baselines (95% Wilson intervals, :func:`agent.stats.wilson_interval`), the fitted
parameter distributions per type pair, coverage, and each participant's
compliance digest.  Uses each participant's latest bundle.  Plots are drawn
with matplotlib's Agg backend and saved next to the page; the page loads no
network resource.
"""

from __future__ import annotations

import html
from pathlib import Path

from ..fsutil import atomic_write
from ..stats import wilson_interval
from .merge import cohort_rows


def _latest(rows):
    return [r for r in rows if r["latest"]]


def _fig():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _metric_table(metrics) -> dict:
    """``{pseudonym: {source: {metric: value}}}`` for the latest bundle of each participant."""
    out: dict = {}
    for m in _latest(metrics):
        out.setdefault(m["pseudonym"], {}).setdefault(m["source"], {})[m["metric"]] = m["value"]
    return out


def _plot_accuracy(quiz, metrics, path: Path) -> bool:
    """Distributions across participants (readable at any cohort size, no row per person).

    Left: participants' own memory-test accuracy, with the chance level in red.
    Then one panel per baseline: the model's held-out agreement minus the
    baseline's, per participant (right of zero: the model did better).
    """
    rows = [r for r in _latest(quiz) if r["answered"]]
    table = _metric_table(metrics)
    diffs: dict[str, list[float]] = {}
    for d in table.values():
        model = d.get("cv", {}).get("agreement")
        for src, m in d.items():
            if src.startswith("baseline:") and src != "baseline:chance_level" and model is not None \
                    and m.get("agreement") is not None:
                diffs.setdefault(src[9:], []).append(model - m["agreement"])
    if not rows and not diffs:
        return False
    plt = _fig()
    n_panels = 1 + len(diffs)
    cols = min(n_panels, 3)  # a grid, so that seven rivals stay readable on one page
    n_rows = -(-n_panels // cols)
    fig, grid = plt.subplots(n_rows, cols, figsize=(4.2 * cols, 3.2 * n_rows), squeeze=False)
    panels = list(grid.ravel())
    for spare in panels[n_panels:]:
        spare.set_visible(False)
    ax = panels[0]
    acc = [r["accuracy"] for r in rows if r.get("accuracy") is not None]
    if acc:
        ax.hist(acc, bins=min(30, max(5, len(acc) // 10)), range=(0, 1), color="#4a7ab0")
        chance = [r["chance"] for r in rows if r.get("chance") is not None]
        if chance:
            ax.axvline(sum(chance) / len(chance), color="tab:red", lw=1, label="chance")
            ax.legend(fontsize=8)
    ax.set_title(f"Participants' accuracy (n = {len(acc)})", fontsize=9)
    ax.set_xlabel("fraction of answered trials correct", fontsize=8)
    ax.set_ylabel("participants", fontsize=8)
    for ax, (name, vals) in zip(panels[1:n_panels], sorted(diffs.items()), strict=True):
        ax.hist(vals, bins=min(30, max(5, len(vals) // 10)), color="#5b8c5a")
        ax.axvline(0, color="tab:red", lw=1)
        ax.set_title(f"model - {name} (n = {len(vals)})", fontsize=9)
        ax.set_xlabel("difference in held-out agreement", fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return True


def _plot_parameters(params, path: Path) -> bool:
    rows = [r for r in _latest(params) if r["parameter"].startswith("theta:")]
    if not rows:
        return False
    plt = _fig()
    pairs = sorted({r["parameter"][6:] for r in rows})
    data = [[r["value"] for r in rows if r["parameter"] == f"theta:{p}"] for p in pairs]
    fig, ax = plt.subplots(figsize=(7, 0.35 * len(pairs) + 1.5))
    ax.boxplot(data, orientation="horizontal", widths=0.6)
    for i, d in enumerate(data, start=1):
        if len(d) <= 30:  # individual values only while they stay readable
            ax.plot(d, [i] * len(d), "o", color="tab:blue", alpha=0.6, markersize=4)
    ax.set_yticks(range(1, len(pairs) + 1), pairs)
    ax.set_xlabel("fitted weight θ")
    ax.set_title("Parameter distributions per type pair")
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return True


def _plot_coverage(coverage, path: Path) -> bool:
    """Histogram of hours observed per participant (latest bundle)."""
    rows = _latest(coverage)
    if not rows:
        return False
    from .cohort import plots

    png = plots.histogram([r["hours"] for r in rows], xlabel="hours with data", title="Coverage")
    if png is None:
        return False
    path.write_bytes(png)
    return True


def _table(rows, cols, limit: int = 50) -> str:
    more = len(rows) - limit
    rows = rows[:limit]
    head = "".join(f"<th>{html.escape(c)}</th>" for c in cols)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(_fmt(r.get(c)))}</td>" for c in cols) + "</tr>"
                   for r in rows)
    note = f"<p>… and {more} more rows: see the merged tables.</p>" if more > 0 else ""
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>{note}"


def _fmt(v) -> str:
    if v is None:
        return "—"
    if isinstance(v, float):
        return f"{v:.3g}"
    return str(v)


def report(study_dir, out) -> Path:
    """Write ``out/report.html`` and its PNG plots; returns the page's path."""
    from .. import __version__
    from .registry import Registry

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    t = cohort_rows(study_dir)
    reg = Registry.load(study_dir)
    parts = [f"<h1>Cohort report: {html.escape(reg.study_id)}</h1>",
             f"<p>{len(reg.devices)} enrolled device(s); {len({r['pseudonym'] for r in t['coverage']})} "
             f"sent at least one bundle; {sum(len(d.seen) for d in reg.devices.values())} bundle(s) opened. "
             f"Each participant's latest "
             f"bundle is shown. lethe {html.escape(__version__)}.</p>"]

    parts.append("<h2>Memory test: the model against chance and baselines</h2>")
    if _plot_accuracy(t["quiz"], t["metrics"], out / "accuracy.png"):
        parts.append('<img src="accuracy.png" alt="accuracy per participant">')
    rows = []
    for r in _latest(t["quiz"]):
        lo, hi = wilson_interval(r["correct"], r["answered"]) if r["answered"] else (None, None)
        rows.append({**r, "ci_low": lo, "ci_high": hi})
    parts.append(_table(rows, ["pseudonym", "trials", "answered", "correct", "accuracy", "ci_low", "ci_high",
                               "chance", "p_value", "agreement"]) if rows else "<p>No quiz summaries yet.</p>")

    parts.append("<h2>Fitted parameters per type pair</h2>")
    if _plot_parameters(t["parameters"], out / "parameters.png"):
        parts.append('<img src="parameters.png" alt="parameter distributions">')
    else:
        parts.append("<p>No fitted models yet.</p>")

    parts.append("<h2>Coverage</h2>")
    if _plot_coverage(t["coverage"], out / "coverage.png"):
        parts.append('<img src="coverage.png" alt="coverage per participant">')
    cov = _latest(t["coverage"])
    parts.append(_table(cov, [c for c in (cov[0] if cov else {}) if c not in ("latest", "policy_fingerprint")]))

    parts.append("<h2>Compliance digest per participant</h2>")
    # Hashes shortened for the page; the full values are in the merged tables.
    comp = [{**r, "policy_fingerprint": r["policy_fingerprint"][:16] + "…",
             "ledger_head_hash": str(r["ledger_head_hash"])[:16] + "…"} for r in _latest(t["compliance"])]
    parts.append("<p>From each bundle's ledger digest (signed on the device, verified here with the "
                 "bundle's signature): retention violations, raw-file exposure, and the ledger head an "
                 "ethics board can compare with the device's ledger.</p>")
    parts.append(_table(comp, ["pseudonym", "seq", "created", "policy_fingerprint", "violations",
                               "max_exposure_s", "median_exposure_s", "p95_exposure_s", "ledger_head_seq",
                               "ledger_head_hash"]))
    withdrawn = [d for d in reg.devices.values() if d.withdrawn]
    if withdrawn:
        parts.append("<p>Withdrawn: " + ", ".join(html.escape(d.pseudonym) for d in withdrawn) + "</p>")

    page = ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>lethe cohort report: {html.escape(reg.study_id)}</title>"
            "<style>body{font-family:sans-serif;max-width:60em;margin:2em auto;padding:0 1em}"
            "table{border-collapse:collapse;font-size:90%;margin:1em 0}"
            "td,th{border:1px solid #ccc;padding:2px 6px;text-align:right}"
            "img{max-width:100%}</style></head><body>\n" + "\n".join(parts) + "\n</body></html>\n")
    path = out / "report.html"
    atomic_write(path, page.encode("utf-8"))
    return path
