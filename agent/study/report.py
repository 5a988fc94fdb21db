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
    """Two panels per participant, each point with its 95% interval.

    Left: held-out agreement with the participant's own choices (what the model
    is fitted to), the model against each baseline.  Right: accuracy against the
    true place, the participant's own score (Wilson interval) beside the model's
    and the baselines'.  Chance is the red line.
    """
    rows = [r for r in _latest(quiz) if r["answered"]]
    if not rows:
        return False
    table = _metric_table(metrics)
    plt = _fig()
    fig, axes = plt.subplots(1, 2, figsize=(12, 0.9 * len(rows) + 2.2), sharey=True)
    sources = ["cv"] + sorted({s for d in table.values() for s in d
                               if s.startswith("baseline:") and s != "baseline:chance_level"})
    labels = {"cv": "model (held out)"}
    markers = ["o", "s", "^", "D", "v", "P", "X"]
    step = 0.7 / max(len(sources), 1)
    for ax, metric, title in ((axes[0], "agreement", "Held-out agreement with the participant's choices"),
                              (axes[1], "accuracy", "Accuracy against the true place")):
        for y, r in enumerate(rows):
            d = table.get(r["pseudonym"], {})
            for i, src in enumerate(sources):
                m = d.get(src, {})
                v = m.get(metric)
                if v is None:
                    continue
                lo, hi = m.get(f"{metric}_ci_low", v), m.get(f"{metric}_ci_high", v)
                yy = y - 0.35 + (i + 0.5) * step
                ax.errorbar(v, yy, xerr=[[max(v - lo, 0)], [max(hi - v, 0)]], fmt=markers[i % len(markers)],
                            color=f"C{i}", capsize=2, markersize=5,
                            label=labels.get(src, src.replace("baseline:", "baseline: ")) if y == 0 else None)
            if metric == "accuracy":
                lo, hi = wilson_interval(r["correct"], r["answered"])
                ax.errorbar(r["accuracy"], y + 0.42, xerr=[[r["accuracy"] - lo], [hi - r["accuracy"]]],
                            fmt="*", color="black", capsize=3, markersize=9,
                            label="participant's own score" if y == 0 else None)
            if r.get("chance") is not None:
                ax.axvline(r["chance"], color="tab:red", lw=1, label="chance" if y == 0 else None)
        ax.set_xlim(0, 1)
        ax.set_xlabel(f"{metric} (fraction of answered trials, 95% intervals)")
        ax.set_title(title, fontsize=10)
    axes[0].set_yticks(range(len(rows)), [r["pseudonym"] for r in rows])
    handles, names = [], []
    for ax in axes:
        for h, n in zip(*ax.get_legend_handles_labels()):
            if n not in names:
                handles.append(h)
                names.append(n)
    fig.legend(handles, names, loc="lower center", ncol=4, fontsize=8, bbox_to_anchor=(0.5, 0.0))
    fig.tight_layout(rect=(0, 0.12, 1, 1))
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
        ax.plot(d, [i] * len(d), "o", color="tab:blue", alpha=0.6, markersize=4)
    ax.set_yticks(range(1, len(pairs) + 1), pairs)
    ax.set_xlabel("fitted weight θ")
    ax.set_title("Parameter distributions per type pair")
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return True


def _plot_coverage(coverage, path: Path) -> bool:
    rows = _latest(coverage)
    if not rows:
        return False
    plt = _fig()
    import numpy as np

    kinds = sorted({k[6:] for r in rows for k in r if k.startswith("hours_")})
    x = np.arange(len(rows))
    w = 0.8 / (len(kinds) + 1)
    fig, ax = plt.subplots(figsize=(max(6, 1.2 * len(rows) + 3.5), 3.5))
    ax.bar(x, [r["hours"] for r in rows], w, label="hours observed", color="grey")
    for i, k in enumerate(kinds, start=1):
        ax.bar(x + i * w, [r.get(f"hours_{k}", 0) for r in rows], w, label=k)
    ax.set_xticks(x + w * len(kinds) / 2, [r["pseudonym"] for r in rows], rotation=30, ha="right")
    ax.set_ylabel("hours")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8)
    ax.set_title("Coverage per participant")
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return True


def _table(rows, cols) -> str:
    head = "".join(f"<th>{html.escape(c)}</th>" for c in cols)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(_fmt(r.get(c)))}</td>" for c in cols) + "</tr>"
                   for r in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


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
             f"sent at least one bundle; {len(t['coverage'])} bundle(s) opened. Each participant's latest "
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
