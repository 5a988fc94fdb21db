"""Memory-test trial generation, answer import and scoring."""

from __future__ import annotations

import json
from datetime import datetime, timedelta, UTC
from zoneinfo import ZoneInfo

import pytest

from agent.errors import DataError, StateError
from agent.quiz import cue_text, generate_trials, import_answers, issue_trials, score

TZ = "Atlantic/Azores"
PLACES = ["P1", "P2", "P3", "P4", "P5", "P6"]


def make_episodes(start_utc: datetime, hours: int, tz=TZ):
    """Hourly episodes built independently with zoneinfo: local fields from the UTC hour."""
    zone = ZoneInfo(tz)
    out = []
    for h in range(hours):
        u = start_utc + timedelta(hours=h)
        loc = u.astimezone(zone)
        out.append({
            "key": loc.isoformat(timespec="minutes"), "utc": u.timestamp(),
            "date": loc.date().isoformat(), "hour": loc.hour, "weekday": loc.weekday(),
            "week": 1 + h // (24 * 7), "place": PLACES[(h // 3) % len(PLACES)],
            "sound": None, "motion": None, "moods": [], "coverage": {},
        })
    return out


@pytest.fixture
def episodes():
    return make_episodes(datetime(2026, 10, 1, tzinfo=UTC), 24 * 21)


NOW = datetime(2026, 10, 22, tzinfo=UTC).timestamp()


def test_every_trial_is_consistent_with_its_episode(episodes, default_policy):
    plan = generate_trials(episodes, default_policy, now=NOW, n=40)
    by_key = {e["key"]: e for e in episodes}
    zone = ZoneInfo(TZ)
    assert len(plan.trials) == 40
    for t in plan.trials:
        e = by_key[t["episode"]]
        assert t["correct"] == e["place"]
        assert t["correct"] in t["options"]
        assert len(set(t["options"])) == default_policy.quiz.options
        assert set(t["options"]) <= set(PLACES)
        # the cue's hour and weekday agree with the IANA zone's local time (zoneinfo + tzdata)
        local = datetime.fromtimestamp(e["utc"], zone)
        assert (t["hour"], t["weekday"]) == (local.hour, local.weekday())
        assert f"between {local.hour:02d}:00" in t["cue_text"]
        assert local.strftime("%A") in t["cue_text"]


def test_trials_respect_the_retention_window(episodes, default_policy):
    plan = generate_trials(episodes, default_policy, now=NOW, n=500)
    q = default_policy.quiz
    for t in plan.trials:
        e = next(e for e in episodes if e["key"] == t["episode"])
        age_days = (NOW - (e["utc"] + 3600)) / 86400
        assert q.min_age_days <= age_days <= q.max_age_days


def test_no_probe_hour_is_used_twice(episodes, default_policy):
    first = generate_trials(episodes, default_policy, now=NOW, n=100)
    again = generate_trials(episodes, default_policy, now=NOW, n=500,
                            used_episodes={t["episode"] for t in first.trials}, batch=1)
    keys = [t["episode"] for t in first.trials + again.trials]
    assert len(keys) == len(set(keys))


def test_generation_is_reproducible(episodes, default_policy):
    a = generate_trials(episodes, default_policy, now=NOW, n=10)
    b = generate_trials(episodes, default_policy, now=NOW, n=10)
    assert a.trials == b.trials


def test_excluded_and_merged_places(episodes, default_policy):
    places = {"P6": {"exclude": True}, "P5": {"merged_into": "P1"}}
    plan = generate_trials(episodes, default_policy, now=NOW, n=200, places=places)
    for t in plan.trials:
        assert "P6" not in t["options"] and "P5" not in t["options"]


def test_too_few_places_is_a_clear_error(default_policy):
    eps = make_episodes(datetime(2026, 10, 1, tzinfo=UTC), 24 * 10)
    for e in eps:
        e["place"] = "P1" if e["hour"] < 12 else "P2"
    with pytest.raises(StateError, match="at least 4 visited places"):
        generate_trials(eps, default_policy, now=NOW)


def test_repeated_autumn_hour_is_named_with_its_offset():
    # IANA tz database: Atlantic/Azores leaves summer time at 01:00 UTC on 2026-10-25,
    # so local 00:00-01:00 occurs twice (UTC+00:00 then UTC-01:00).
    eps = make_episodes(datetime(2026, 10, 24, 22, tzinfo=UTC), 6)
    from agent.quiz import _mark_repeated_hours

    _mark_repeated_hours(eps)
    repeated = [e for e in eps if e["repeated_hour"]]
    assert [e["key"] for e in repeated] == ["2026-10-25T00:00+00:00", "2026-10-25T00:00-01:00"]
    assert cue_text(repeated[0]).endswith("(clock time UTC+00:00)")
    assert cue_text(repeated[1]).endswith("(clock time UTC-01:00)")


# ---------------------------------------------------------------- with a real vault
@pytest.fixture
def vault(home):
    from agent.vault import Vault

    v = Vault.open(home)
    yield v
    v.close()


@pytest.fixture
def issued(vault, episodes, default_policy):
    with vault.transaction():
        for e in episodes:
            vault.put("episodes", e["key"], e)
    return issue_trials(vault, default_policy, now=NOW, n=5)


def _write(tmp_path, rows, name="answers.json"):
    p = tmp_path / name
    p.write_text(json.dumps({"answers": rows}))
    return p


def test_import_valid_answers(vault, issued, default_policy, tmp_path):
    rows = [{"trial_id": t["trial_id"], "choice": t["correct"], "rt_s": 2.5} for t in issued[:3]]
    rows.append({"trial_id": issued[3]["trial_id"], "choice": None, "rt_s": 1.0})
    assert import_answers(vault, _write(tmp_path, rows)) == 4
    s = score(vault, default_policy)
    assert (s["answered"], s["skipped"], s["correct"], s["pending"]) == (3, 1, 3, 1)


def test_import_unknown_trial(vault, issued, tmp_path):
    p = _write(tmp_path, [{"trial_id": "nope", "choice": "P1", "rt_s": 1}])
    with pytest.raises(DataError, match=r"answers\[0\]: unknown trial 'nope'"):
        import_answers(vault, p)
    assert vault.count("answers") == 0


def test_import_wrong_option(vault, issued, tmp_path):
    t = issued[0]
    wrong = next(p for p in PLACES if p not in t["options"])
    p = _write(tmp_path, [{"trial_id": t["trial_id"], "choice": wrong, "rt_s": 1}])
    with pytest.raises(DataError, match="is not one of the options"):
        import_answers(vault, p)


def test_import_duplicate_in_file(vault, issued, tmp_path):
    t = issued[0]
    row = {"trial_id": t["trial_id"], "choice": t["correct"], "rt_s": 1}
    with pytest.raises(DataError, match="appears twice"):
        import_answers(vault, _write(tmp_path, [row, row]))
    assert vault.count("answers") == 0  # nothing imported from a bad file


def test_import_already_answered(vault, issued, tmp_path):
    t = issued[0]
    row = {"trial_id": t["trial_id"], "choice": t["correct"], "rt_s": 1}
    import_answers(vault, _write(tmp_path, [row]))
    with pytest.raises(DataError, match="already been answered"):
        import_answers(vault, _write(tmp_path, [row], "again.json"))


def test_import_csv_bad_header(vault, issued, tmp_path):
    p = tmp_path / "a.csv"
    p.write_text("trial,answer\nx,y\n")
    with pytest.raises(DataError, match="header trial_id,choice,rt_s"):
        import_answers(vault, p)


def test_score_against_chance_uses_exact_binomial(vault, issued, default_policy, tmp_path):
    from scipy.stats import binomtest

    rows = [{"trial_id": t["trial_id"], "choice": t["correct"] if i < 4 else
             next(o for o in t["options"] if o != t["correct"]), "rt_s": 1}
            for i, t in enumerate(issued)]
    import_answers(vault, _write(tmp_path, rows))
    s = score(vault, default_policy)
    assert s["correct"] == 4 and s["answered"] == 5
    assert s["p_value"] == pytest.approx(binomtest(4, 5, 0.25, alternative="greater").pvalue)
