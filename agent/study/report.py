"""``lethe study report``: one self-contained HTML page with PNG plots of the cohort.

Sections: per-participant memory-test accuracy against chance and the
baselines (95% Wilson intervals, :func:`agent.stats.wilson_interval`), the fitted
parameter distributions per type pair, coverage, and each participant's
compliance digest, and the cautions every report carries.  Uses each
participant's latest bundle.  Plots are drawn with matplotlib's Agg backend and
saved next to the page; the page loads no network resource.  The page is the
jinja2 template ``agent/templates/study_report.html`` (autoescape on).
"""

from __future__ import annotations

from pathlib import Path

from .. import templates
from ..fsutil import atomic_write
from ..policy_summary import CAUTIONS
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


ROW_LIMIT = 50
"""Rows shown per table; the rest are in the merged tables (``lethe study merge``)."""


def table_view(rows, cols, empty: str = "No rows yet.", limit: int = ROW_LIMIT) -> dict:
    """One table for the page: ``{"cols", "heads", "rows" (cells as text), "more", "empty"}``.

    Cells are plain text; the template escapes them (jinja2 autoescape).  ``heads``
    are the column names with a zero-width space after each underscore, so that a
    narrow column's header wraps between words.
    """
    if limit < 0:
        raise ValueError(f"limit must be a non-negative number of rows, got {limit!r}")
    cols = list(cols)
    return {"cols": cols, "heads": [c.replace("_", "_\u200b") for c in cols],
            "rows": [[_fmt(r.get(c)) for c in cols] for r in rows[:limit]],
            "more": max(0, len(rows) - limit), "empty": empty}


def _fmt(v) -> str:
    if v is None:
        return "—"
    if isinstance(v, float):
        return f"{v:.3g}"
    return str(v)


def render_page(context: dict) -> str:
    """The cohort page (``agent/templates/study_report.html``) from a context of plain values.

    Keys: ``study_id``, ``version``, ``n_enrolled``, ``n_sending``, ``n_opened``,
    ``plots`` (``{"accuracy", "parameters", "coverage"}`` -> bool), ``quiz``,
    ``coverage``, ``compliance`` (each from :func:`table_view`), ``withdrawn``
    (pseudonyms) and ``cautions``.  Every value is escaped by the template.
    """
    return templates.render("study_report.html", **context)


def report(study_dir, out) -> Path:
    """Write ``out/report.html`` and its PNG plots; returns the page's path."""
    from .. import __version__
    from .registry import Registry

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    t = cohort_rows(study_dir)
    reg = Registry.load(study_dir)

    quiz = []
    for r in _latest(t["quiz"]):
        lo, hi = wilson_interval(r["correct"], r["answered"]) if r["answered"] else (None, None)
        quiz.append({**r, "ci_low": lo, "ci_high": hi})
    cov = _latest(t["coverage"])
    # Hashes shortened for the page; the full values are in the merged tables.
    comp = [{**r, "policy_fingerprint": r["policy_fingerprint"][:16] + "…",
             "ledger_head_hash": str(r["ledger_head_hash"])[:16] + "…"} for r in _latest(t["compliance"])]
    context = {
        "study_id": reg.study_id, "version": __version__,
        "n_enrolled": len(reg.devices), "n_sending": len({r["pseudonym"] for r in t["coverage"]}),
        "n_opened": sum(len(d.seen) for d in reg.devices.values()),
        "plots": {"accuracy": _plot_accuracy(t["quiz"], t["metrics"], out / "accuracy.png"),
                  "parameters": _plot_parameters(t["parameters"], out / "parameters.png"),
                  "coverage": _plot_coverage(t["coverage"], out / "coverage.png")},
        "quiz": table_view(quiz, ["pseudonym", "trials", "answered", "correct", "accuracy", "ci_low", "ci_high",
                                  "chance", "p_value", "agreement"], empty="No quiz summaries yet."),
        "coverage": table_view(cov, [c for c in (cov[0] if cov else {}) if c not in ("latest", "policy_fingerprint")],
                               empty="No coverage yet."),
        "compliance": table_view(comp, ["pseudonym", "seq", "created", "policy_fingerprint", "violations",
                                        "max_exposure_s", "median_exposure_s", "p95_exposure_s",
                                        "ledger_head_seq", "ledger_head_hash"], empty="No bundles yet."),
        "withdrawn": [d.pseudonym for d in reg.devices.values() if d.withdrawn],
        "cautions": list(CAUTIONS),
    }
    path = out / "report.html"
    atomic_write(path, render_page(context).encode("utf-8"))
    return path
