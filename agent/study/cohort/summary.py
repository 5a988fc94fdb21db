"""One flat row of numbers per participant, from their latest bundle (what cohort plots and analyses use).

Only identifiable quantities are summarised: each edge weight θ is relative to
the payload's ``reference_pair`` (whose own weight is fixed by the fit and so
carries no information), and β; held-out agreement and log-likelihood of the
model and of each baseline, and their paired differences.
"""

from __future__ import annotations

from collections.abc import Iterator


def participant_summary(pseudonym: str, seq: int, doc: dict) -> dict:
    p = doc["payload"]
    c, g = p["counts"], p["ledger_digest"]
    row: dict = {"pseudonym": pseudonym, "seq": seq, "created": p["created"], "hours": c["hours"],
                 **{f"hours_{k}": v for k, v in c["hours_by_kind"].items()},
                 "violations": g["violations"], "max_exposure_s": g.get("max_exposure_s"),
                 "p95_exposure_s": g.get("p95_exposure_s"), "ledger_head_seq": g["head"]["seq"]}
    q = p.get("quiz")
    if q:
        row.update({"answered": q["answered"], "correct": q["correct"], "accuracy": q.get("accuracy"),
                    "chance": q.get("chance")})
    m = p.get("model")
    if m:
        ref = m["params"].get("reference_pair")
        for pair, w in m["params"]["theta"].items():
            if pair != ref:
                row[f"theta:{pair}"] = w
        if m["params"].get("beta") is not None:
            row["beta"] = m["params"]["beta"]
        pooled = m["cv"]["pooled"]
        for metric in ("agreement", "loglik"):
            if metric in pooled:
                row[f"model:{metric}"] = pooled[metric]
                for b, vals in m["baselines"].items():
                    if isinstance(vals, dict) and metric in vals and b != "chance_level":
                        row[f"{b}:{metric}"] = vals[metric]
                        row[f"diff:{b}:{metric}"] = pooled[metric] - vals[metric]
        if "n" in pooled:
            row["n_trials_cv"] = pooled["n"]
    return row


def summaries(source) -> Iterator[dict]:
    """Stream one summary per participant (latest bundle; withdrawn left out by the source)."""
    for name, seq, doc in source.records(latest_only=True):
        yield participant_summary(name, seq, doc)
