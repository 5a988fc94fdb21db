"""``lethe study merge``: the opened bundles as cohort tables (CSV; Parquet too with pyarrow).

One row per (participant, bundle, item); the column ``latest`` marks each
participant's most recent bundle (payloads are cumulative, so cohort analyses
normally use only those rows).  Tables, all keyed by ``pseudonym`` and ``seq``:

``edges``       type pair, count (empty when withheld), withheld flag
``parameters``  fitted parameter name (``theta:hour|place``, ``beta``, ``tau``) and value
``metrics``     source (``cv``, ``fold:<i>``, ``baseline:<name>``), metric, value
``quiz``        trials, answered, correct, accuracy, chance, p_value, agreement
``coverage``    hours observed, total and per kind
``compliance``  ledger head, violations, raw exposure statistics, event counts
"""

from __future__ import annotations

import csv
import io
import os
from pathlib import Path

from ..home import fsync_dir
from .registry import Registry

TABLES = ("edges", "parameters", "metrics", "quiz", "coverage", "compliance")


def cohort_rows(study_dir) -> dict[str, list[dict]]:
    """The cohort tables as lists of row dicts (what :func:`merge` writes)."""
    received = list(Registry.load(study_dir).received())
    latest = {}
    for name, seq, _ in received:
        latest[name] = max(seq, latest.get(name, 0))
    t: dict[str, list[dict]] = {k: [] for k in TABLES}
    for name, seq, doc in received:
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


def _columns(rows: list[dict]) -> list[str]:
    cols: list[str] = []
    for r in rows:
        for k in r:
            if k not in cols:
                cols.append(k)
    return cols


def _write_atomic(path: Path, data: bytes) -> None:
    tmp = path.with_name(f".{path.name}.tmp{os.getpid()}")
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def merge(study_dir, out) -> dict[str, Path]:
    """Write the cohort tables into ``out``; returns ``{table: path}`` (CSV, and ``<table>.parquet``)."""
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    tables = cohort_rows(study_dir)
    written: dict[str, Path] = {}
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        pa = None
    for name, rows in tables.items():
        cols = _columns(rows) or ["pseudonym", "seq"]
        buf = io.StringIO()
        w = csv.DictWriter(buf, fieldnames=cols, lineterminator="\n")
        w.writeheader()
        for r in rows:
            w.writerow({k: ("" if r.get(k) is None else r.get(k)) for k in cols})
        path = out / f"{name}.csv"
        _write_atomic(path, buf.getvalue().encode("utf-8"))
        written[name] = path
        if pa is not None:
            ppath = out / f"{name}.parquet"
            pq.write_table(pa.Table.from_pylist([{k: r.get(k) for k in cols} for r in rows]) if rows
                           else pa.table({c: [] for c in cols}), ppath)
            written[f"{name}.parquet"] = ppath
    fsync_dir(out)
    return written
