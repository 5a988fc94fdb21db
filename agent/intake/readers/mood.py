"""Mood self-reports: ``*.mood.csv`` or ``*.mood.json``.

Every report rates exactly the policy's emotions (``schedule.emotions``) with
integers on [``schedule.mood_scale_min``, ``schedule.mood_scale_max``].  A file
is rejected as a whole on the first bad report: a self-report with a wrong
scale or a foreign emotion list means the prompt was not the approved one.
"""

from __future__ import annotations

import json

from ..item import ItemResult
from ._common import decode_text, now_or, parse_iso, plausible_time, reject


def read_mood(path, data: bytes, policy, *, suffix: str | None = None,
              now: float | None = None) -> ItemResult:
    now = now_or(now)
    reports = _parse_json(path, data) if suffix == ".mood.json" else _parse_csv(path, data, policy)
    if not reports:
        reject(path, "no_reports", "the file holds no report")
    out = [_validate(path, i, t, ratings, policy, now) for i, (t, ratings) in enumerate(reports)]
    out.sort(key=lambda r: r["t"])
    rows = [(f":{i}", r) for i, r in enumerate(out)]
    return ItemResult(kind="mood", rows={"mood_reports": rows}, n_samples=len(rows),
                      t_start=out[0]["t"], t_end=out[-1]["t"])


def _validate(path, i, t_text, ratings, policy, now) -> dict:
    s = policy.schedule
    where = f"report {i + 1}"
    try:
        t = parse_iso(t_text) if isinstance(t_text, str) else None
    except (ValueError, OverflowError):
        t = None
    if t is None:
        reject(path, "bad_timestamp", f"{where}: time is not ISO 8601 with 'Z' or an offset")
    why = plausible_time(t, now)
    if why:
        reject(path, "bad_timestamp", f"{where}: time is {why}")
    if not isinstance(ratings, dict):
        reject(path, "bad_json", f"{where}: 'ratings' must be an object")
    emotions = list(s.emotions)
    unknown = sorted(k for k in ratings if k not in emotions)
    if unknown:
        reject(path, "unknown_emotion",
               f"{where}: {len(unknown)} emotion(s) not in schedule.emotions")
    missing = [e for e in emotions if e not in ratings]
    if missing:
        reject(path, "missing_emotion", f"{where}: no rating for {', '.join(missing)}")
    lo, hi = int(s.mood_scale_min), int(s.mood_scale_max)
    clean = {}
    for e in emotions:
        v = ratings[e]
        if isinstance(v, bool) or not isinstance(v, int):
            reject(path, "bad_rating", f"{where}: the rating of {e} is not an integer")
        if not lo <= v <= hi:
            reject(path, "rating_out_of_range",
                   f"{where}: the rating of {e} is outside [{lo}, {hi}] "
                   "(schedule.mood_scale_min, mood_scale_max)")
        clean[e] = int(v)
    return {"t": float(t), "ratings": clean}


def _parse_csv(path, data: bytes, policy):
    text = decode_text(path, data)
    lines = [ln for ln in text.splitlines() if ln.strip()]
    if not lines:
        reject(path, "bad_header", "no header line")
    header = [h.strip() for h in lines[0].split(",")]
    if not header or header[0].lower() != "time":
        reject(path, "bad_header", "the header must start with 'time'")
    names = header[1:]
    if len(set(names)) != len(names):
        reject(path, "bad_header", "an emotion column is repeated")
    emotions = set(policy.schedule.emotions)
    unknown = [n for n in names if n not in emotions]
    if unknown:
        reject(path, "unknown_emotion", f"{len(unknown)} column(s) not in schedule.emotions")
    reports = []
    for k, line in enumerate(lines[1:], start=1):
        cells = [c.strip() for c in line.split(",")]
        if len(cells) != len(header):
            reject(path, "bad_row", f"data row {k} has {len(cells)} cells, the header {len(header)}")
        ratings = {}
        for name, cell in zip(names, cells[1:], strict=True):   # lengths checked just above
            try:
                ratings[name] = int(cell)
            except ValueError:
                reject(path, "bad_rating", f"data row {k}: the rating of {name} is not an integer")
        reports.append((cells[0], ratings))
    return reports


def _parse_json(path, data: bytes):
    text = decode_text(path, data)
    try:
        doc = json.loads(text)
    except (ValueError, RecursionError):
        reject(path, "bad_json", "not valid JSON")
    if not isinstance(doc, dict) or not isinstance(doc.get("reports"), list):
        reject(path, "bad_json", 'expected {"reports": [{"time": …, "ratings": {…}}, …]}')
    reports = []
    for i, r in enumerate(doc["reports"]):
        if not isinstance(r, dict) or "time" not in r or "ratings" not in r:
            reject(path, "bad_json", f"report {i + 1} lacks 'time' or 'ratings'")
        reports.append((r["time"], r["ratings"]))
    return reports
