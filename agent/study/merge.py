"""``lethe study merge`` lives in :mod:`agent.study.cohort.merge` (streaming tables, data dictionary).

This module keeps the name importable and holds :func:`cohort_rows`, the
in-memory wide rows the HTML report reads (withdrawn participants left out).
"""

from __future__ import annotations


from .cohort.merge import TABLES, merge
from .cohort.source import as_source

__all__ = ["TABLES", "cohort_rows", "merge"]

_OLD_TABLES = ("edges", "parameters", "metrics", "quiz", "coverage", "compliance")


def cohort_rows(study_dir, *, latest_only: bool = True) -> dict[str, list[dict]]:
    """The cohort as lists of row dicts (wide coverage and compliance rows), for the report.

    By default only each participant's latest bundle is read (what the report
    shows), so memory grows with participants, not with bundles.
    """
    src = as_source(study_dir)
    latest = {p["pseudonym"]: p["latest_seq"] for p in src.participants()}
    t: dict[str, list[dict]] = {k: [] for k in _OLD_TABLES}
    for name, seq, doc in src.records(latest_only=latest_only):
        p = doc["payload"]
        base = {"pseudonym": name, "seq": seq, "created": p["created"], "latest": seq == latest[name],
                "policy_fingerprint": p["policy_fingerprint"]}
        c = p["counts"]
        for pair, n in c["pairs"].items():
            t["edges"].append({**base, "pair": pair, "count": n, "withheld": n is None,
                               "dp": c["dp"] is not None})
        m = p.get("model")
        if m:
            for pair, w in m["params"]["theta"].items():
                t["parameters"].append({**base, "parameter": f"theta:{pair}", "value": w})
            for k in ("beta", "tau"):
                if m["params"].get(k) is not None:
                    t["parameters"].append({**base, "parameter": k, "value": m["params"][k]})
            for metric, v in m["cv"]["pooled"].items():
                t["metrics"].append({**base, "source": "cv", "metric": metric, "value": v})
            for i, fold in enumerate(m["cv"]["folds"]):
                for metric, v in fold.items():
                    t["metrics"].append({**base, "source": f"fold:{i}", "metric": metric, "value": v})
            for bname, vals in m["baselines"].items():
                for metric, v in vals.items():
                    t["metrics"].append({**base, "source": f"baseline:{bname}", "metric": metric, "value": v})
        q = p.get("quiz")
        if q:
            t["quiz"].append({**base, **q})
        t["coverage"].append({**base, "hours": c["hours"],
                              **{f"hours_{k}": v for k, v in sorted(c["hours_by_kind"].items())}})
        g = p["ledger_digest"]
        t["compliance"].append({**base, "ledger_head_seq": g["head"]["seq"], "ledger_head_hash": g["head"]["hash"],
                                "violations": g["violations"], "max_exposure_s": g.get("max_exposure_s"),
                                "median_exposure_s": g.get("median_exposure_s"),
                                "p95_exposure_s": g.get("p95_exposure_s"),
                                **{f"count:{k}": v for k, v in sorted(g["counts"].items())}})
    return t
