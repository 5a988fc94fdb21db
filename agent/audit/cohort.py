"""The compliance view for a whole cohort, from the ledger digests in opened bundles.

Every bundle carries a *ledger digest* computed on the device
(:func:`agent.ledger.digest`): event counts, the exposure median, 95th
percentile and maximum, the number of retention violations and the ledger head.
The researcher's side stores opened bundles as
``STUDYDIR/received/<pseudonym>/<seq>.json`` (``{"header", "payload"}``).  This
module reads those files only; it needs no key and opens nothing.

Per participant it checks:

``violations``
    no bundle reports a retention violation;
``max_exposure``
    the largest reported exposure is within the policy's ``retention.raw_seconds``
    (when the policy with that fingerprint is known);
``head``
    the ledger head sequence number never goes backwards from one bundle to the
    next (a rolled-back or replaced ledger would);
``approved``
    the policy fingerprint is on the study card (``STUDYDIR/card.json``) when present;
``enrolled_policy``
    the policy is the one the device enrolled under (``STUDYDIR/registry.json``) when present.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import DataError, LetheError
from ..plots import empty, figure, save, styled
from ..templates import Markup, esc, table
from .report import cautions_html, fmt_s, page

CHECK_SHORT = {"violations": "no violations", "max_exposure": "within limit", "head": "head monotone",
               "approved": "approved", "enrolled_policy": "enrolled policy"}

CHECK_WORDS = {
    "violations": "no retention violation reported by the device",
    "max_exposure": "largest exposure within the policy limit",
    "head": "ledger never went backwards between bundles",
    "approved": "policy approved on the study card",
    "enrolled_policy": "same policy as at enrolment",
}


@dataclass
class Participant:
    pseudonym: str
    bundles: list = field(default_factory=list)   # (seq, created, digest, policy_fingerprint)
    checks: dict = field(default_factory=dict)    # check -> (ok or None, message)

    @property
    def latest(self):
        return self.bundles[-1]

    @property
    def ok(self) -> bool:
        return all(ok is not False for ok, _ in self.checks.values())


def read_received(study_dir) -> dict[str, list]:
    """``{pseudonym: [(seq, header, payload), ...]}`` sorted by seq, from ``STUDYDIR/received``."""
    base = Path(study_dir) / "received"
    if not base.is_dir():
        raise DataError(f"{base}: no opened bundles here (expected STUDYDIR/received/<pseudonym>/<seq>.json)")
    out = {}
    for pdir in sorted(p for p in base.iterdir() if p.is_dir()):
        rows = []
        for f in sorted((f for f in pdir.glob("*.json") if f.stem.isdigit()), key=lambda f: int(f.stem)):
            try:
                doc = json.loads(f.read_text("utf-8"))
                header, payload = doc["header"], doc["payload"]
                payload["ledger_digest"]["head"]["seq"]
            except (ValueError, KeyError, TypeError) as e:
                raise DataError(f"{f}: not an opened bundle with a ledger digest ({e.__class__.__name__}: {e})") \
                    from None
            rows.append((int(f.stem), header, payload))
        if rows:
            out[pdir.name] = rows
    return out


def _known_policies(policies) -> dict:
    """fingerprint -> Policy, from the given policies and the shipped ones."""
    from ..policy import Policy, bundled_policy_path, load_policy

    known = {}
    for p in list(policies or ()):
        p = p if isinstance(p, Policy) else load_policy(p)
        known[p.fingerprint] = p
    for name in ("default", "strict"):
        try:
            p = load_policy(bundled_policy_path(name))
        except LetheError:  # pragma: no cover - shipped policies always load (tested)
            continue
        known.setdefault(p.fingerprint, p)
    return known


def _json_or_none(path: Path):
    try:
        return json.loads(path.read_text("utf-8"))
    except (FileNotFoundError, ValueError):
        return None


def cohort_view(study_dir, policies=None) -> list[Participant]:
    """Read every opened bundle's digest and run the per-participant checks."""
    study_dir = Path(study_dir)
    received = read_received(study_dir)
    known = _known_policies(policies)
    card = _json_or_none(study_dir / "card.json")
    approved = set(card.get("approved_policies", [])) if isinstance(card, dict) else None
    registry = _json_or_none(study_dir / "registry.json")
    devices = registry.get("devices", {}) if isinstance(registry, dict) else {}
    out = []
    for pseudonym, rows in received.items():
        p = Participant(pseudonym)
        for seq, header, payload in rows:
            p.bundles.append((seq, header.get("created"), payload["ledger_digest"], payload.get("policy_fingerprint")))
        viol = [(s, d["violations"]) for s, _, d, _ in p.bundles if d.get("violations")]
        p.checks["violations"] = (not viol, "none" if not viol else
                                  "; ".join(f"bundle #{s}: {n} violation(s)" for s, n in viol))
        fp = p.latest[3]
        pol = known.get(fp)
        max_exp = max((d.get("max_exposure_s") or 0.0) for _, _, d, _ in p.bundles)
        if pol is None:
            p.checks["max_exposure"] = (None, f"policy {str(fp)[:16]}... not known here; limit not checked")
        else:
            lim = pol.retention.raw_seconds
            p.checks["max_exposure"] = (max_exp <= lim, f"max {max_exp:.2f} s, limit {lim:g} s")
        heads = [d["head"]["seq"] for _, _, d, _ in p.bundles]
        back = [(p.bundles[i][0], heads[i - 1], heads[i]) for i in range(1, len(heads)) if heads[i] < heads[i - 1]]
        p.checks["head"] = (not back, "head sequence " + " → ".join(str(h) for h in heads) if not back else
                            "; ".join(f"bundle #{s}: head {b} after {a}" for s, a, b in back))
        if approved is not None:
            p.checks["approved"] = (fp in approved, "on the card" if fp in approved else "NOT on the study card")
        dev = devices.get(pseudonym)
        if isinstance(dev, dict) and dev.get("policy_fingerprint"):
            same = dev["policy_fingerprint"] == fp
            p.checks["enrolled_policy"] = (same, "unchanged" if same else
                                           f"enrolled under {dev['policy_fingerprint'][:16]}..., "
                                           f"now {str(fp)[:16]}...")
        out.append(p)
    return out


@styled
def plot_cohort_exposure(parts: list[Participant], limits: dict, path: Path) -> None:
    import numpy as np

    fig = figure(max(6.4, 0.6 * len(parts) + 2), 3.8)
    ax = fig.add_subplot()
    if parts:
        x = np.arange(len(parts))
        med = [p.latest[2].get("median_exposure_s") or 0 for p in parts]
        p95 = [p.latest[2].get("p95_exposure_s") or 0 for p in parts]
        mx = [max((d.get("max_exposure_s") or 0) for _, _, d, _ in p.bundles) for p in parts]
        w = 0.27
        ax.bar(x - w, med, w, label="median", color="#9ecae1")
        ax.bar(x, p95, w, label="95th percentile", color="#4292c6")
        ax.bar(x + w, mx, w, label="maximum", color="#08519c")
        for lim in sorted(set(v for v in limits.values() if v is not None)):
            ax.axhline(lim, color="#c62828", linewidth=2.5, label=f"policy limit {lim:g} s")
        ax.set_xticks(x, [p.pseudonym for p in parts], rotation=30 if len(parts) > 6 else 0)
        ax.set_ylabel("seconds")
        top = max(mx + [v for v in limits.values() if v is not None] + [1.0])
        ax.set_ylim(0, top * 1.4)
        ax.legend(loc="upper left", ncol=4, fontsize=9)
    else:
        empty(ax, "no participants")
    ax.set_title("Raw exposure per participant (latest digest)")
    save(fig, path)


@styled
def plot_cohort_items(parts: list[Participant], path: Path) -> None:
    import numpy as np

    fig = figure(max(6.4, 0.6 * len(parts) + 2), 3.8)
    ax = fig.add_subplot()
    if parts:
        x = np.arange(len(parts))
        w = 0.27
        for i, (ev, colour) in enumerate((("received", "#2ca02c"), ("destroyed", "#7f7f7f"),
                                          ("rejected", "#e45756"))):
            ax.bar(x + (i - 1) * w, [p.latest[2]["counts"].get(ev, 0) for p in parts], w, label=ev, color=colour)
        ax.set_xticks(x, [p.pseudonym for p in parts], rotation=30 if len(parts) > 6 else 0)
        ax.set_ylabel("raw items (ledger entries)")
        top = max([p.latest[2]["counts"].get("received", 0) for p in parts] + [1])
        ax.set_ylim(0, top * 1.3)
        ax.legend(loc="upper left", ncol=3)
    else:
        empty(ax, "no participants")
    ax.set_title("Raw items per participant (latest digest)")
    save(fig, path)


def write_cohort_report(study_dir, out_dir, policies=None) -> Path:
    """Write the cohort compliance report (``index.html``, PNGs, ``report.json``) into ``out_dir``.

    Parameters
    ----------
    study_dir : path-like
        The researcher's study directory (``received/<pseudonym>/<seq>.json``).
    out_dir : path-like
    policies : iterable of Policy or path, optional
        Policies to look fingerprints up in (the shipped ones are always known).

    Returns
    -------
    pathlib.Path
        ``out_dir / "index.html"``.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    parts = cohort_view(study_dir, policies)
    known = _known_policies(policies)
    limits = {p.pseudonym: (known[p.latest[3]].retention.raw_seconds if p.latest[3] in known else None)
              for p in parts}
    plot_cohort_exposure(parts, limits, out / "cohort_exposure.png")
    plot_cohort_items(parts, out / "cohort_items.png")
    ok = all(p.ok for p in parts) and bool(parts)
    n_bad = sum(not p.ok for p in parts)
    figures = {"ok": ok, "participants": [
        {"pseudonym": p.pseudonym, "ok": p.ok, "bundles": [s for s, *_ in p.bundles],
         "policy_fingerprint": p.latest[3], "digest": p.latest[2],
         "checks": {k: {"ok": v[0], "message": v[1]} for k, v in p.checks.items()}} for p in parts]}
    (out / "report.json").write_text(json.dumps(figures, indent=2, sort_keys=True) + "\n", "utf-8")

    verdict = (f"PASSED: all {len(parts)} participant(s) within the limits on every check." if ok else
               f"FAILED: {n_bad} of {len(parts)} participant(s) fail at least one check." if parts else
               "FAILED: no opened bundles to check.")
    body = ["<h1>Cohort retention compliance report</h1>",
            f'<p class="sub">From the ledger digests in {sum(len(p.bundles) for p in parts)} opened bundle(s) '
            f"of {len(parts)} participant(s). The digests are computed and signed on each device.</p>",
            f'<div class="verdict {"ok" if ok else "bad"}">{esc(verdict)}</div>',
            "<h2>Participants</h2>"]
    rows = []
    for p in parts:
        d = p.latest[2]
        c = d.get("counts", {})
        pol = known.get(p.latest[3])
        rows.append([esc(p.pseudonym), len(p.bundles), esc(p.latest[1] or "–"),
                     esc(pol.policy.name if pol else str(p.latest[3])[:16] + "..."),
                     c.get("received", 0), c.get("destroyed", 0), c.get("rejected", 0),
                     esc(fmt_s(d.get("median_exposure_s"))), esc(fmt_s(d.get("p95_exposure_s"))),
                     esc(fmt_s(d.get("max_exposure_s"))),
                     esc("–" if limits[p.pseudonym] is None else f"{limits[p.pseudonym]:g} s"),
                     d.get("violations", 0),
                     Markup('<span class="pass">pass</span>' if p.ok else '<span class="fail">FAIL</span>')])
    body.append(table(["participant", "bundles", "last bundle", "policy", "received", "destroyed", "rejected",
                       "median", "p95", "max", "limit", "violations", "result"], rows,
                      num_cols=(1, 2, 4, 5, 6, 7, 8, 9, 10, 11), cls="wide"))
    body.append('<div class="grid">')
    for name, cap in (("cohort_exposure.png", "Exposure from each participant's latest digest; the red line is "
                                              "the policy limit."),
                      ("cohort_items.png", "Raw items received, destroyed and rejected, per participant.")):
        body.append(f'<figure><img src="{name}" alt="{esc(cap)}"><figcaption>{esc(cap)}</figcaption></figure>')
    body.append("</div>")
    body.append("<h2>Checks per participant</h2>")
    used = [k for k in CHECK_WORDS if any(k in p.checks for p in parts)]
    body.append("<ul>" + "".join(f"<li><b>{esc(CHECK_SHORT[k])}</b>: {esc(CHECK_WORDS[k])}</li>" for k in used)
                + "</ul>")

    def mark(res):
        return Markup('<span class="pass">pass</span>' if res else '<span class="fail">FAIL</span>' if res is False
                      else "not checked")

    body.append(table(["participant"] + [CHECK_SHORT[k] for k in used],
                      [[esc(p.pseudonym)] + [mark(p.checks[k][0]) if k in p.checks else "–" for k in used]
                       for p in parts], cls="wide"))
    fails = [(p.pseudonym, k, msg) for p in parts for k, (res, msg) in p.checks.items() if res is not True]
    if fails:
        body.append("<h3>Failed or unchecked, in detail</h3><ul>" + "".join(
            f"<li>{esc(ps)}, {esc(CHECK_WORDS[k])}: {esc(msg)}</li>" for ps, k, msg in fails) + "</ul>")
    body.append("<h2>What a digest can and cannot show</h2><ul>"
                "<li>A digest is a summary the device computed from its own ledger; it is authenticated with "
                "the bundle's signature but holds no per-item detail. A full check needs the device ledger "
                "(<code>lethe audit verify</code> on a copy of the home).</li>"
                "<li>Exposure figures cover items destroyed up to the bundle's creation; later items appear in "
                "the next bundle.</li></ul>")
    body.append("<h2>Cautions</h2>")
    body.append(cautions_html())
    path = out / "index.html"
    path.write_text(page("lethe cohort retention compliance report", "\n".join(body)), "utf-8")
    return path
