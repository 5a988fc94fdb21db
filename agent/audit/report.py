"""The ethics board's compliance report: one self-contained HTML page with PNG plots.

``write_report(home, out_dir)`` writes::

    OUT/index.html          the report (inline CSS, no scripts, no network resources)
    OUT/exposure.png        raw exposure histogram with the policy limit marked
    OUT/items_per_day.png   raw items received per kind per UTC day
    OUT/rejections.png      rejected raw files by reason
    OUT/exports.png         exports over time (from ``exported`` ledger events)
    OUT/report.json         the figures shown, for machine checks

Plots use matplotlib's Agg canvas directly (no global backend switch, no
display).  Every figure in the page comes from the ledger verification of
:mod:`agent.audit.verify`; nothing in the report names a file, a place or any
content.
"""

from __future__ import annotations

import json
import time
from pathlib import Path

from .. import templates
from ..errors import LetheError
from ..templates import Markup, esc, table
from ..home import Home
from ..plots import empty, figure, integer_ticks, save, styled
from ..policy_summary import CAUTIONS, summarise

KIND_COLOURS = {"audio": "#1f77b4", "gps": "#2ca02c", "accel": "#ff7f0e", "mood": "#9467bd",
                "unknown": "#7f7f7f"}

CSS = """
body { font-family: "DejaVu Sans", "Liberation Sans", Arial, sans-serif; color: #1a1a1a;
       max-width: 1080px; margin: 24px auto; padding: 0 24px; line-height: 1.45; font-size: 16px; }
h1 { font-size: 28px; margin-bottom: 4px; }
h2 { font-size: 21px; border-bottom: 2px solid #d0d7de; padding-bottom: 4px; margin-top: 32px; }
h3 { font-size: 17px; margin-bottom: 4px; }
.sub { color: #555; margin-top: 0; }
.verdict { padding: 14px 18px; border-radius: 6px; font-size: 19px; font-weight: bold; margin: 18px 0; }
.ok { background: #e6f4ea; border: 2px solid #2e7d32; color: #1b5e20; }
.bad { background: #fdecea; border: 2px solid #c62828; color: #8e0000; }
table { border-collapse: collapse; margin: 8px 0 16px 0; }
th, td { border: 1px solid #d0d7de; padding: 5px 10px; text-align: left; vertical-align: top; }
th { background: #f3f5f7; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.wide { font-size: 14px; }
table.wide th, table.wide td { padding: 4px 7px; }
.pass { color: #1b5e20; font-weight: bold; }
.fail { color: #b71c1c; font-weight: bold; }
code, .fp { font-family: "DejaVu Sans Mono", "Liberation Mono", monospace; font-size: 14px;
            word-break: break-all; }
.grid { display: flex; flex-wrap: wrap; gap: 16px; }
figure { margin: 0; flex: 1 1 480px; }
figure img { width: 100%; max-width: 520px; border: 1px solid #d0d7de; }
figcaption { font-size: 14px; color: #444; }
.caution { background: #fff8e1; border-left: 5px solid #f9a825; padding: 8px 14px; margin: 6px 0; }
.small { font-size: 14px; color: #444; }
ul { margin-top: 4px; }
"""


def page(title: str, body: str) -> str:
    """A complete HTML document with the report's inline style (jinja2, autoescape)."""
    return templates.page(title, Markup(body), CSS)


def fmt_s(x) -> str:
    return "–" if x is None else f"{x:.2f} s"


# -- plots -----------------------------------------------------------------------
@styled
def plot_exposure(exposures, limit_s, path: Path, stats: dict | None = None) -> None:
    """Histogram of raw exposure in seconds with the limit as a red line."""
    import numpy as np

    fig = figure()
    ax = fig.add_subplot()
    xs = np.asarray(list(exposures), float)
    if xs.size:
        hi = max(float(xs.max()), float(limit_s or 0)) * 1.05 or 1.0
        over = 0
        if limit_s and hi > 3 * limit_s:
            # A few very late items would squash the histogram; fold them into the last bin.
            hi = 3 * limit_s
            over = int((xs > hi).sum())
            xs = np.minimum(xs, hi * 0.999)
        ax.hist(xs, bins=np.linspace(0, hi, 41), color="#4c78a8", edgecolor="white")
        if over:
            ax.annotate(f"{over} later than {hi:g} s", xy=(hi, 0), xytext=(0.97, 0.55),
                        textcoords="axes fraction", ha="right", color="#c62828",
                        arrowprops={"arrowstyle": "->", "color": "#c62828"})
        if stats and stats.get("median_s") is not None:
            ax.axvline(stats["median_s"], color="#222", linestyle=":", linewidth=1.5,
                       label=f"median {stats['median_s']:.2f} s")
            ax.axvline(stats["p95_s"], color="#555", linestyle="--", linewidth=1.2,
                       label=f"95th percentile {stats['p95_s']:.2f} s")
        ax.set_xlabel("seconds from file complete to destroyed")
        ax.set_ylabel("raw files")
        integer_ticks(ax.yaxis)
    else:
        empty(ax, "no destroyed raw files recorded")
    if limit_s is not None:
        ax.axvline(limit_s, color="#c62828", linewidth=2.5, label=f"policy limit {limit_s:g} s")
    if xs.size or limit_s is not None:
        ax.legend(loc="upper right")
    ax.set_title("Raw exposure")
    save(fig, path)


@styled
def plot_items_per_day(daily: dict, path: Path) -> None:
    """Grouped bars: raw items received per kind per UTC day."""
    import numpy as np

    fig = figure(6.4 if len(daily) <= 16 else 9.0, 3.6)
    ax = fig.add_subplot()
    days = sorted(daily)
    kinds = [k for k in KIND_COLOURS if any(k in daily[d] for d in days)]
    if days and kinds:
        x = np.arange(len(days))
        w = 0.8 / len(kinds)
        for i, k in enumerate(kinds):
            ax.bar(x + (i - (len(kinds) - 1) / 2) * w, [daily[d].get(k, 0) for d in days], w,
                   label=k, color=KIND_COLOURS[k])
        step = max(1, len(days) // 10)
        ax.set_xticks(x[::step], [d[5:] for d in days][::step])
        ax.set_xlabel("day (UTC, month-day)")
        ax.set_ylabel("raw items received")
        integer_ticks(ax.yaxis)
        ax.legend(ncol=len(kinds), loc="upper left")
    else:
        empty(ax, "no raw items recorded")
    ax.set_title("Raw items per kind per day")
    save(fig, path)


@styled
def plot_rejections(rejections: dict, path: Path) -> None:
    fig = figure(6.4, max(2.4, 0.45 * len(rejections) + 1.4))
    ax = fig.add_subplot()
    if rejections:
        items = sorted(rejections.items(), key=lambda kv: (kv[1], kv[0]))
        ax.barh([k for k, _ in items], [v for _, v in items], color="#e45756")
        for i, (_, v) in enumerate(items):
            ax.text(v, i, f" {v}", va="center", fontsize=9)
        ax.set_xlabel("rejected raw files")
        integer_ticks(ax.xaxis)
    else:
        empty(ax, "no rejected raw files")
    ax.set_title("Rejections by reason")
    save(fig, path)


@styled
def plot_exports(exports: list, path: Path) -> None:
    import datetime as dt

    fig = figure()
    ax = fig.add_subplot()
    if exports:
        ts = [dt.datetime.fromtimestamp(e["t"], dt.UTC) for e in exports]
        ax.step(ts, range(1, len(ts) + 1), where="post", color="#4c78a8")
        ax.plot(ts, range(1, len(ts) + 1), "o", color="#4c78a8")
        ax.set_ylabel("exports so far")
        integer_ticks(ax.yaxis)
        ax.set_ylim(0, len(ts) + 0.5)
        fig.autofmt_xdate()
    else:
        empty(ax, "no exports recorded")
    ax.set_title("Exports over time")
    save(fig, path)


# -- page parts ----------------------------------------------------------------

def summary_html(policy) -> str:
    s = summarise(policy)
    out = [f"<p>{esc(s.title)}. Fingerprint (SHA-256 of the canonical resolved policy): "
           f"<span class=\"fp\">{esc(s.fingerprint)}</span></p>"]
    for heading, lines in s.sections:
        out.append(f"<h3>{esc(heading)}</h3><ul>" + "".join(f"<li>{esc(x)}</li>" for x in lines) + "</ul>")
    return "\n".join(out)


def cautions_html() -> str:
    return "\n".join(f'<div class="caution">{esc(c)}</div>' for c in CAUTIONS)


LIMITS_OF_REPORT = (
    "The ledger records what the agent did. It cannot show copies made outside the agent, "
    "for example by a recorder app, a backup or a cloud-synced folder.",
    "Exposure is measured from the moment the agent saw a file complete; time a file spent "
    "being written before that is not covered.",
    "Times come from the device clock. A wrong clock shifts all times but not the intervals "
    "between entries.",
    "A signature shows the entry was made with this device's key. Anyone who holds that key "
    "(the participant's account) could have written a consistent ledger.",
)


def _now_utc(t=None) -> str:
    return time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime(time.time() if t is None else t))


# report.json: version 2 names the exposure statistics with their unit (median_s, p95_s, max_s:
# agent.stats.exposure_summary); the unnumbered first layout called them median, p95, max.
REPORT_FIGURES_VERSION = 2


def report_figures(result) -> dict:
    """The figures the page shows, as a plain dict (also written to ``report.json``, docs/audit.md)."""
    r = result.report
    return {"format": "lethe-audit-figures", "version": REPORT_FIGURES_VERSION,
            "ok": result.ok, "exit_code": result.exit_code, "verdict": result.verdict(),
            "entries": r.entries, "head": r.head, "limit_s": r.limit_s,
            "exposure": dict(r.exposure), "violations": len(r.violations), "problems": len(r.problems),
            "pending": len(r.pending), "kinds": r.kinds, "daily": r.daily, "rejections": r.rejections,
            "exports": [{"t": e["t"], "bundle_seq": e["bundle_seq"]} for e in r.exports],
            "policy": {"name": result.policy_name, "fingerprint": result.policy_fingerprint},
            "device_key_id": r.device_key_id, "key_storage": getattr(result, "key_storage", None),
            "withdrawn": getattr(result, "withdrawn", None)}


def write_report(home, out_dir, policy=None, now: float | None = None) -> Path:
    """Verify ``home``'s ledger and write the board's report into ``out_dir``.

    Parameters
    ----------
    home : Home or path-like
        A lethe home or a copy of it (no passphrase needed).
    out_dir : path-like
        Created if missing; existing report files are replaced.
    policy : agent.policy.Policy, optional
        The policy to judge by; default the home's ``policy.toml``.
    now : float, optional
        Unix seconds for judging items not yet destroyed.

    Returns
    -------
    pathlib.Path
        ``out_dir / "index.html"``.
    """
    from .verify import verify_home, violation_words

    home = home if isinstance(home, Home) else Home(home)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    result = verify_home(home, policy=policy, now=now)
    r = result.report
    policy_problem = None
    if policy is None and home.policy_path.exists():
        try:
            policy = home.load_policy()
        except LetheError as err:  # shown on the page: a board must see that the policy did not load
            policy, policy_problem = None, str(err)

    plot_exposure(r.exposures, r.limit_s, out / "exposure.png", r.exposure)
    plot_items_per_day(r.daily, out / "items_per_day.png")
    plot_rejections(r.rejections, out / "rejections.png")
    plot_exports(r.exports, out / "exports.png")
    figures = report_figures(result)
    (out / "report.json").write_text(json.dumps(figures, indent=2, sort_keys=True) + "\n", "utf-8")

    e = r.exposure or {}
    body = ["<h1>Retention compliance report</h1>",
            f'<p class="sub">Device ledger of a lethe home, checked {esc(_now_utc(r.verified_at))}.'
            f" Policy: {esc(result.policy_name or 'none found')}.</p>",
            f'<div class="verdict {"ok" if result.ok else "bad"}">{esc(result.verdict())}</div>',
            *([f'<div class="verdict bad">The home\'s policy file could not be read: {esc(policy_problem)}</div>']
              if policy_problem else []),
            "<p>This report reads the device's own record of what happened to every raw file (the ledger). "
            "Each entry is signed with the device's key and linked to the one before, so a removed, edited "
            "or reordered entry shows. It checks that every raw file that arrived was destroyed, and no later "
            f"than the policy allows ({esc('not checked' if r.limit_s is None else f'{r.limit_s:g} seconds')} "
            "after it had finished arriving). It needs no password and opens no personal data.</p>"]
    if result.key_storage == "plain":
        body.append('<div class="verdict bad">Warning: this home keeps its keys as plain files (chosen at '
                    "enrolment with --key-storage plain). Anyone who copied the home could read the vault and "
                    "sign ledger entries as this device.</div>")
    from .verify import PROVES

    body += [f"<p>{esc(p)}</p>" for p in PROVES]

    key_rows = [
        ["Ledger entries", f"{r.entries}"],
        ["Head entry", Markup(f"{r.head['seq']} <span class=\"fp\">{esc(r.head['hash'])}</span>")],
        ["Device key", Markup(f"<span class=\"fp\">{esc(r.device_key_id or 'unavailable')}</span>")],
        ["Raw files destroyed", f"{e.get('n', 0)}"],
        ["Exposure median", esc(fmt_s(e.get("median_s")))],
        ["Exposure 95th percentile", esc(fmt_s(e.get("p95_s")))],
        ["Exposure maximum", esc(fmt_s(e.get("max_s")))],
        ["Policy limit (retention.raw_seconds)", esc("not checked" if r.limit_s is None else f"{r.limit_s:g} s")],
        ["Retention violations", f"{len(r.violations)}"],
        ["Integrity problems", f"{len(r.problems)}"],
        ["Still within the raw window", f"{len(r.pending)}"],
        ["Exports recorded", f"{len(r.exports)}"],
    ]
    if r.first_t is not None:
        key_rows.insert(1, ["Period (UTC)", esc(f"{_now_utc(r.first_t)} to {_now_utc(r.last_t)}")])
    body.append("<h2>Key figures</h2>")
    body.append(table(["figure", "value"], key_rows))

    body.append("<h2>Integrity checks</h2>")
    body.append("<p>Each ledger entry is hash-chained to the one before and signed with the device key; "
                "the anchor file records the last entry so that a rollback to an older copy shows.</p>")
    body.append(table(["check", "result"],
                      [[esc(w), Markup('<span class="pass">pass</span>' if ok else '<span class="fail">FAIL</span>')]
                       for w, ok in result.checks()]))
    if r.problems:
        body.append("<h3>Problems found</h3><ul>" + "".join(
            f"<li><b>{esc(p['check'])}</b>: {esc(p['message'])}</li>" for p in r.problems) + "</ul>")

    body.append("<h2>Raw data: received, used, destroyed</h2>")
    body.append(table(["kind", "received", "featurised", "rejected", "destroyed"],
                      [[esc(x["kind"]), x["received"], x["featurised"], x["rejected"], x["destroyed"]]
                       for x in result.kind_rows()] or [["(none)", 0, 0, 0, 0]], num_cols=(1, 2, 3, 4)))
    if r.violations:
        body.append(f"<h3>Retention violations ({len(r.violations)})</h3><ul>" + "".join(
            f"<li>{esc(violation_words(v))}</li>" for v in r.violations) + "</ul>")
    for f in result.policy_findings:
        body.append(f'<p class="fail">Policy: {esc(f["message"])}</p>')

    body.append('<div class="grid">')
    for name, caption in (
            ("exposure.png", "Seconds each raw file existed after it was complete. The red line is the "
                             "policy's limit; every bar must lie to its left."),
            ("items_per_day.png", "Raw files received per day, by kind. Gaps show pauses or days without "
                                  "recording."),
            ("rejections.png", "Raw files that could not be used, by reason. They were destroyed like "
                               "the others."),
            ("exports.png", "Sealed bundles prepared for the study, from the ledger's export entries.")):
        body.append(f'<figure><img src="{name}" alt="{esc(caption)}"><figcaption>{esc(caption)}'
                    f"</figcaption></figure>")
    body.append("</div>")
    if r.rejections:
        body.append(table(["reason", "files"], [[esc(k), v] for k, v in sorted(r.rejections.items())],
                          num_cols=(1,)))

    body.append("<h2>The policy, in plain words</h2>")
    body.append(summary_html(policy) if policy is not None else "<p>No policy found in the home.</p>")

    body.append("<h2>Cautions</h2>")
    body.append(cautions_html())
    body.append("<h2>What this report cannot show</h2><ul>"
                + "".join(f"<li>{esc(x)}</li>" for x in LIMITS_OF_REPORT) + "</ul>")
    if r.notes:
        body.append("<h3>Notes from verification</h3><ul class=\"small\">"
                    + "".join(f"<li>{esc(n)}</li>" for n in r.notes[:50]) + "</ul>")
    body.append('<p class="small">Generated by lethe audit report. Figures: report.json in this '
                "directory. How each check works: docs/audit.md.</p>")

    path = out / "index.html"
    path.write_text(page("lethe retention compliance report", "\n".join(body)), "utf-8")
    return path
