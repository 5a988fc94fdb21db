"""``lethe study merge``: the cohort as tables, written as it streams (CSV, constant memory).

Every table is long ("tidy"): one row per participant, bundle and item, with
fixed columns, so rows are written as each bundle is read and memory does not
grow with the cohort.  Every table carries ``pseudonym``, ``seq`` (the
bundle's sequence number) and ``latest`` (true on each participant's most
recent bundle; payloads are cumulative, so cohort analyses normally use only
those rows).  Withdrawn participants are left out.  ``data_dictionary.csv``
describes every column of every table.
"""

from __future__ import annotations

import csv
import os
from pathlib import Path

from ...fsutil import fsync_dir
from .source import as_source

K = ("pseudonym", "seq", "latest")

# table -> [(column, type, unit, description)]
DICTIONARY: dict[str, list[tuple[str, str, str, str]]] = {
    "participants": [
        ("pseudonym", "text", "", "the participant's random pseudonym (carries no information about the person)"),
        ("enrolled", "date", "YYYY-MM-DD", "date on the enrolment file"),
        ("policy_fingerprint", "text", "hex", "SHA-256 fingerprint of the policy the device enrolled under"),
        ("bundles", "integer", "count", "bundles opened for this participant"),
        ("latest_seq", "integer", "", "sequence number of the participant's latest bundle (empty: none yet)"),
    ],
    "pair_counts": [
        ("pseudonym", "text", "", "participant pseudonym"), ("seq", "integer", "", "bundle sequence number"),
        ("latest", "boolean", "", "true on the participant's latest bundle"),
        ("created", "date", "YYYY-MM-DD or YYYY-Www", "bundle date, coarsened by the policy"),
        ("pair", "text", "kind|kind", "type pair of the co-occurrence graph, or 'other' (merged small cells)"),
        ("hours", "integer", "hours", "episodes (local clock hours) in which both kinds co-occurred; "
                                      "empty when withheld"),
        ("withheld", "boolean", "", "true when small-cell suppression withheld the count"),
        ("dp", "boolean", "", "true when the counts carry discrete Laplace noise (differential privacy)"),
    ],
    "edges": [
        ("pseudonym", "text", "", "participant pseudonym"), ("seq", "integer", "", "bundle sequence number"),
        ("latest", "boolean", "", "true on the participant's latest bundle"),
        ("degree_cap", "integer", "edges per node", "the degree cap the device applied"),
        ("source", "text", "kind:label", "one end of the edge (labels are per-device random codes)"),
        ("target", "text", "kind:label", "the other end of the edge"),
    ],
    "parameters": [
        ("pseudonym", "text", "", "participant pseudonym"), ("seq", "integer", "", "bundle sequence number"),
        ("latest", "boolean", "", "true on the participant's latest bundle"),
        ("parameter", "text", "", "theta:kind|kind (edge weight per type pair), beta (choice sensitivity) "
                                  "or tau (retrieval temperature)"),
        ("value", "number", "", "fitted value"),
    ],
    "metrics": [
        ("pseudonym", "text", "", "participant pseudonym"), ("seq", "integer", "", "bundle sequence number"),
        ("latest", "boolean", "", "true on the participant's latest bundle"),
        ("source", "text", "", "cv (pooled cross-validation), fold:<i>, or baseline:<name>"),
        ("metric", "text", "", "metric name as the device's model wrote it"),
        ("value", "number", "", "metric value"),
    ],
    "quiz": [
        ("pseudonym", "text", "", "participant pseudonym"), ("seq", "integer", "", "bundle sequence number"),
        ("latest", "boolean", "", "true on the participant's latest bundle"),
        ("trials", "integer", "count", "memory-test trials issued"),
        ("answered", "integer", "count", "trials answered"), ("correct", "integer", "count", "answers correct"),
        ("accuracy", "number", "proportion", "correct / answered"),
        ("chance", "number", "proportion", "accuracy expected by guessing"),
        ("p_value", "number", "", "exact binomial tail of the accuracy against chance"),
        ("agreement", "number", "proportion", "model's agreement with the participant's choices"),
    ],
    "coverage": [
        ("pseudonym", "text", "", "participant pseudonym"), ("seq", "integer", "", "bundle sequence number"),
        ("latest", "boolean", "", "true on the participant's latest bundle"),
        ("kind", "text", "", "'all' (any data) or a node kind: place, sound, motion, mood"),
        ("hours", "integer", "hours", "local clock hours with data of this kind"),
    ],
    "compliance": [
        ("pseudonym", "text", "", "participant pseudonym"), ("seq", "integer", "", "bundle sequence number"),
        ("latest", "boolean", "", "true on the participant's latest bundle"),
        ("ledger_head_seq", "integer", "", "sequence number of the device ledger's last entry"),
        ("ledger_head_hash", "text", "hex", "hash of the device ledger's last entry"),
        ("violations", "integer", "count", "retention violations the device's own check found"),
        ("max_exposure_s", "number", "s", "longest time a raw file existed before destruction"),
        ("median_exposure_s", "number", "s", "median raw-file exposure"),
        ("p95_exposure_s", "number", "s", "95th percentile raw-file exposure"),
    ],
    "ledger_counts": [
        ("pseudonym", "text", "", "participant pseudonym"), ("seq", "integer", "", "bundle sequence number"),
        ("latest", "boolean", "", "true on the participant's latest bundle"),
        ("counter", "text", "", "ledger event counter, e.g. audio.received, gps.destroyed"),
        ("count", "integer", "count", "value of the counter in the bundle's ledger digest"),
    ],
}
TABLES = tuple(DICTIONARY)


def columns(table: str) -> list[str]:
    return [c[0] for c in DICTIONARY[table]]


def bundle_rows(pseudonym: str, seq: int, latest: bool, doc: dict):
    """Yield ``(table, row)`` for one opened bundle (the rows :func:`merge` writes)."""
    p = doc["payload"]
    base = {"pseudonym": pseudonym, "seq": seq, "latest": latest}
    c = p["counts"]
    for pair, n in sorted(c["pairs"].items()):
        yield "pair_counts", {**base, "created": p["created"], "pair": pair, "hours": n, "withheld": n is None,
                              "dp": c.get("dp") is not None}
    el = p.get("edge_list")
    if el:
        nodes = el["nodes"]
        for i, j in el["edges"]:
            yield "edges", {**base, "degree_cap": el["degree_cap"], "source": nodes[i], "target": nodes[j]}
    m = p.get("model")
    if m:
        for pair, w in sorted(m["params"]["theta"].items()):
            yield "parameters", {**base, "parameter": f"theta:{pair}", "value": w}
        for k in ("beta", "tau"):
            if m["params"].get(k) is not None:
                yield "parameters", {**base, "parameter": k, "value": m["params"][k]}
        for metric, v in sorted(m["cv"]["pooled"].items()):
            yield "metrics", {**base, "source": "cv", "metric": metric, "value": v}
        for i, fold in enumerate(m["cv"]["folds"]):
            for metric, v in sorted(fold.items()):
                yield "metrics", {**base, "source": f"fold:{i}", "metric": metric, "value": v}
        for bname, vals in sorted(m["baselines"].items()):
            for metric, v in sorted(vals.items()):
                yield "metrics", {**base, "source": f"baseline:{bname}", "metric": metric, "value": v}
    q = p.get("quiz")
    if q:
        yield "quiz", {**base, **{k: q.get(k) for k in columns("quiz")[3:]}}
    yield "coverage", {**base, "kind": "all", "hours": c["hours"]}
    for k, v in sorted(c["hours_by_kind"].items()):
        yield "coverage", {**base, "kind": k, "hours": v}
    g = p["ledger_digest"]
    yield "compliance", {**base, "ledger_head_seq": g["head"]["seq"], "ledger_head_hash": g["head"]["hash"],
                         "violations": g["violations"], "max_exposure_s": g.get("max_exposure_s"),
                         "median_exposure_s": g.get("median_exposure_s"), "p95_exposure_s": g.get("p95_exposure_s")}
    for k, v in sorted(g["counts"].items()):
        yield "ledger_counts", {**base, "counter": k, "count": v}


def merge(study, out, *, latest_only: bool = False) -> dict[str, Path]:
    """Write the cohort tables into ``out`` as they stream; returns ``{table: path}``.

    Parameters
    ----------
    study : path-like or CohortSource
        A study folder, or a source such as the server's database.
    out : path-like
        Output folder; every table is ``<table>.csv`` plus ``data_dictionary.csv``.
    latest_only : bool
        Only each participant's latest bundle.
    """
    src = as_source(study)
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    written: dict[str, Path] = {}
    files, writers = {}, {}
    try:
        for t in TABLES:
            path = out / f".{t}.csv.tmp{os.getpid()}"
            f = open(path, "w", newline="", encoding="utf-8")  # noqa: SIM115 - closed in finally
            files[t] = (f, path)
            w = csv.DictWriter(f, fieldnames=columns(t), lineterminator="\n")
            w.writeheader()
            writers[t] = w
        parts = src.participants()
        for p in parts:
            writers["participants"].writerow({k: ("" if p.get(k) is None else p.get(k))
                                              for k in columns("participants")})
        latest = {p["pseudonym"]: p["latest_seq"] for p in parts}
        for name, seq, doc in src.records(latest_only=latest_only):
            for table, row in bundle_rows(name, seq, seq == latest.get(name), doc):
                writers[table].writerow({k: ("" if row.get(k) is None else row.get(k)) for k in columns(table)})
        for t, (f, path) in files.items():
            f.flush()
            os.fsync(f.fileno())
            f.close()
            dest = out / f"{t}.csv"
            os.replace(path, dest)
            written[t] = dest
        files.clear()
    finally:
        for f, path in files.values():
            f.close()
            path.unlink(missing_ok=True)
    dd = out / ".data_dictionary.csv.tmp"
    with open(dd, "w", newline="", encoding="utf-8") as f:
        dw = csv.writer(f, lineterminator="\n")
        dw.writerow(["table", "column", "type", "unit", "description"])
        for t, cols in DICTIONARY.items():
            for c in cols:
                dw.writerow([t, *c])
        f.flush()
        os.fsync(f.fileno())
    os.replace(dd, out / "data_dictionary.csv")
    written["data_dictionary"] = out / "data_dictionary.csv"
    fsync_dir(out)
    return written
