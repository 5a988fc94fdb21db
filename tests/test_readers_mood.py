"""Mood self-report reader: CSV and JSON, the policy's emotions, integer ratings in range."""

from __future__ import annotations

import json

import pytest

from agent.errors import RejectedInput
from agent.intake import featurise

T0 = 1793793600.0
NOW = T0 + 86400.0


def ratings(policy, value=4, **over):
    r = {e: value for e in policy.schedule.emotions}
    r.update(over)
    return r


def mood_json(reports) -> bytes:
    return json.dumps({"reports": reports}).encode()


def mood_csv(policy, rows, columns=None) -> bytes:
    cols = columns or list(policy.schedule.emotions)
    lines = [",".join(["time"] + cols)] + [",".join([t] + [str(v) for v in vals]) for t, vals in rows]
    return ("\n".join(lines) + "\n").encode()


def reason(name, data, policy):
    with pytest.raises(RejectedInput) as e:
        featurise(name, data, policy, now=NOW)
    return e.value.reason


def test_json_reports(default_policy):
    r = featurise("p.mood.json", mood_json([{"time": "2026-11-04T12:00:00Z", "ratings": ratings(default_policy)}]),
                  default_policy, now=NOW)
    (sfx, row), = r.rows["mood_reports"]
    assert r.kind == "mood" and sfx == ":0"
    assert row == {"t": T0, "ratings": ratings(default_policy)}


def test_csv_reports_in_any_column_order(default_policy):
    cols = list(reversed(default_policy.schedule.emotions))
    data = mood_csv(default_policy, [("2026-11-04T13:00:00+01:00", [3] * len(cols))], columns=cols)
    (_, row), = featurise("p.mood.csv", data, default_policy, now=NOW).rows["mood_reports"]
    assert row["t"] == T0 and row["ratings"] == ratings(default_policy, 3)


def test_scale_ends_are_accepted(default_policy):
    lo, hi = default_policy.schedule.mood_scale_min, default_policy.schedule.mood_scale_max
    data = mood_json([{"time": "2026-11-04T12:00:00Z", "ratings": ratings(default_policy, lo, happy=hi)}])
    assert featurise("p.mood.json", data, default_policy, now=NOW).n_samples == 1


def test_missing_emotion_is_rejected(default_policy):
    r = ratings(default_policy)
    del r["calm"]
    assert reason("p.mood.json", mood_json([{"time": "2026-11-04T12:00:00Z", "ratings": r}]),
                  default_policy) == "missing_emotion"


def test_non_integer_rating_is_rejected(default_policy):
    data = mood_json([{"time": "2026-11-04T12:00:00Z", "ratings": ratings(default_policy, happy=4.5)}])
    assert reason("p.mood.json", data, default_policy) == "bad_rating"


def test_boolean_rating_is_rejected(default_policy):
    data = mood_json([{"time": "2026-11-04T12:00:00Z", "ratings": ratings(default_policy, happy=True)}])
    assert reason("p.mood.json", data, default_policy) == "bad_rating"


def test_invalid_json_is_rejected(default_policy):
    assert reason("p.mood.json", b'{"reports": [', default_policy) == "bad_json"


def test_deeply_nested_json_is_rejected_not_crashing(default_policy):
    assert reason("p.mood.json", b"[" * 100000 + b"]" * 100000, default_policy) == "bad_json"


def test_empty_report_list_is_rejected(default_policy):
    assert reason("p.mood.json", mood_json([]), default_policy) == "no_reports"


def test_csv_row_with_missing_cell_is_rejected(default_policy):
    data = mood_csv(default_policy, [("2026-11-04T12:00:00Z", [3] * 10)])
    assert reason("p.mood.csv", data, default_policy) == "bad_row"
