"""The researcher's dashboard: who is enrolled, invited, withdrawn, overdue; compliance; coverage; model results.

Rendered with jinja2 (autoescape on) and matplotlib PNGs; no JavaScript.  All
analyses leave withdrawn participants out automatically (their certificates
stay on record and are counted).  Figures are distributions across
participants, so the page reads the same at 5 participants as at 1,000.
"""

from __future__ import annotations

import datetime as _dt
import threading
from collections import defaultdict

from starlette.responses import HTMLResponse

from ..cohort import plots
from ..cohort.summary import summaries

CAUTION = ("Data on this page come from participants who consented under an approved protocol. Use them only "
           "as the ethics board approved and as data-protection law requires; where this page and local law "
           "or the board's decision differ, the law and the board decide. Deletion on participants' devices "
           "follows NIST SP 800-88 in spirit but cannot be guaranteed on SSDs, journaling or copy-on-write "
           "file systems, backups or sync services.")


def _env():
    import jinja2

    return jinja2.Environment(loader=jinja2.PackageLoader("agent.study.server", "templates"),
                              autoescape=jinja2.select_autoescape(["html"], default=True),
                              undefined=jinja2.StrictUndefined)


class Dashboard:
    CSS = ("body{font-family:sans-serif;max-width:64em;margin:1.5em auto;padding:0 1em;color:#222}"
           "table{border-collapse:collapse;font-size:90%;margin:.5em 0}td,th{border:1px solid #ccc;"
           "padding:2px 8px;text-align:right}th{background:#f3f3f3}.num{font-size:160%;font-weight:bold}"
           ".cards{display:flex;gap:1em;flex-wrap:wrap}.card{border:1px solid #ccc;border-radius:6px;"
           "padding:.5em 1em;min-width:8em}.caution{background:#fff6e0;border:1px solid #e0c070;padding:.5em;"
           "font-size:85%}.err{color:#a00}img{max-width:100%}.logout{float:right}")

    def __init__(self, ctx, settings):
        self.ctx = ctx
        self.settings = settings
        self.env = _env()
        self._lock = threading.Lock()
        self._cache: tuple | None = None

    def page(self, name: str, data: dict, status: int = 200) -> HTMLResponse:
        html = self.env.get_template(name).render(study_id=self.ctx.study_id, caution=CAUTION, **data)
        return HTMLResponse(html, status_code=status)

    def _data(self) -> dict:
        """Everything the page and its plots show, recomputed when the database changed."""
        store = self.ctx.store
        counts = store.counts()
        key = (counts["bundles"], counts["withdrawn"], counts["enrolled"], counts["invited"],
               counts["invitations_used"], int(_dt.datetime.now(_dt.UTC).timestamp() // 600))
        with self._lock:
            if self._cache and self._cache[0] == key:
                return self._cache[1]
        parts = store.participants(include_withdrawn=True)
        now = _dt.datetime.now(_dt.UTC)
        limit = _dt.timedelta(days=self.settings.overdue_days)
        overdue = []
        for p in parts:
            if p["withdrawn"]:
                continue
            last = p.get("last_bundle_at") or p.get("enrolled_at")
            try:
                t = _dt.datetime.strptime(last, "%Y-%m-%dT%H:%M:%SZ").replace(tzinfo=_dt.UTC)
            except (TypeError, ValueError):
                continue
            if now - t > limit:
                overdue.append({"pseudonym": p["pseudonym"], "last": p.get("last_bundle_at") or "never",
                                "days": (now - t).days})
        overdue.sort(key=lambda r: -r["days"])
        rows = list(summaries(store))
        cols: dict[str, list] = defaultdict(list)
        for r in rows:
            for k, v in r.items():
                if isinstance(v, int | float) and not isinstance(v, bool):
                    cols[k].append(v)
        with_violation = sum(1 for r in rows if r.get("violations"))
        last_bundle = max((p["last_bundle_at"] for p in parts if p.get("last_bundle_at")), default=None)
        data = {"counts": counts, "active": counts["enrolled"] - counts["withdrawn"],
                "reporting": len(rows), "overdue": overdue[:50], "overdue_n": len(overdue),
                "last_bundle": last_bundle, "with_violation": with_violation, "cols": dict(cols),
                "withdrawn": [p for p in parts if p["withdrawn"]][:50],
                "overdue_days": self.settings.overdue_days}
        with self._lock:
            self._cache = (key, data)
        return data

    def render(self) -> HTMLResponse:
        d = self._data()
        cols = d["cols"]

        def stat(name):
            v = sorted(cols.get(name, []))
            if not v:
                return None
            return {"n": len(v), "median": v[len(v) // 2], "min": v[0], "max": v[-1]}

        diffs = {k.split(":")[1]: stat(k) for k in sorted(cols) if k.startswith("diff:") and k.endswith(":agreement")}
        return self.page("dashboard.html", {**{k: v for k, v in d.items() if k != "cols"},
                                            "diffs": diffs, "hours": stat("hours"),
                                            "max_exposure": stat("max_exposure_s"),
                                            "plots": [n for n in self.PLOTS if self.plot(n) is not None]})

    PLOTS = ("model", "parameters", "coverage", "exposure")

    def plot(self, name: str) -> bytes | None:
        if name not in self.PLOTS:
            return None
        cols = self._data()["cols"]
        if name == "model":
            return plots.paired_differences({k.split(":")[1]: v for k, v in cols.items()
                                             if k.startswith("diff:") and k.endswith(":agreement")})
        if name == "parameters":
            return plots.parameter_boxes({k: v for k, v in cols.items() if k.startswith("theta:") or k == "beta"})
        if name == "coverage":
            return plots.histogram(cols.get("hours", []), xlabel="hours with data (latest bundle)",
                                   title="Coverage")
        return plots.histogram(cols.get("max_exposure_s", []), xlabel="longest raw-file exposure (s)",
                               title="Raw data exposure from ledger digests")
