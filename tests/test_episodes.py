"""Hourly episodes in local time: DST against the IANA tz database, dominance rules, moods."""

from __future__ import annotations

from datetime import date, datetime, UTC
from itertools import pairwise
from zoneinfo import ZoneInfo

import pytest

from agent.episodes import (build_episodes, episodes_from_codes, hour_key, load_episodes,
                            local_hour_starts, study_week)

EMOTIONS = ["happy", "calm", "tired"]


def _utc(*a) -> float:
    return datetime(*a, tzinfo=UTC).timestamp()


def _episodes(coded, moods=(), tz="UTC", now=None, start=None, window=90, present_at=5):
    return episodes_from_codes(coded, list(moods), tz=tz, emotions=EMOTIONS, mood_present_at=present_at,
                               mood_window_minutes=window, study_start_utc=start,
                               now=now if now is not None else 4e9)


def _places_every_10_min(t0, t1, pid="P1"):
    return [{"kind": "place", "t": t, "t_end": t + 600, "id": pid} for t in range(int(t0), int(t1), 600)]


def _independent_local_hours(tz: ZoneInfo, day: date) -> list[str]:
    """Local clock hours of ``day`` by plain datetime arithmetic (no grid walk).

    A wall time exists if it survives a round trip through UTC; it is repeated
    if fold=0 and fold=1 give different offsets (PEP 495 semantics).
    """
    out = []
    for h in range(24):
        for fold in (0, 1):
            loc = datetime(day.year, day.month, day.day, h, tzinfo=tz, fold=fold)
            back = loc.astimezone(UTC).astimezone(tz)
            if back.replace(tzinfo=None) != loc.replace(tzinfo=None):
                continue  # skipped by a spring-forward gap
            if fold == 1 and loc.utcoffset() == loc.replace(fold=0).utcoffset():
                continue  # not a repeated hour
            out.append(back.isoformat(timespec="minutes"))
    return out


# IANA tz database (tzdata): EU rule "last Sunday in March/October at 01:00 UTC";
# US rule "second Sunday in March / first Sunday in November at 02:00 local".
DST_DAYS = [
    ("Europe/London", date(2026, 3, 29), 23, [], ["2026-03-29T01:00"]),
    ("Europe/London", date(2026, 10, 25), 25, ["2026-10-25T01:00+01:00", "2026-10-25T01:00+00:00"], []),
    ("America/New_York", date(2026, 3, 8), 23, [], ["2026-03-08T02:00"]),
    ("America/New_York", date(2026, 11, 1), 25, ["2026-11-01T01:00-04:00", "2026-11-01T01:00-05:00"], []),
]


@pytest.mark.parametrize("zone,day,expected,present,absent", DST_DAYS)
def test_local_hours_on_dst_days_match_the_tz_database(zone, day, expected, present, absent):
    tz = ZoneInfo(zone)
    t0 = datetime(day.year, day.month, day.day, tzinfo=tz).timestamp() - 6 * 3600
    coded = _places_every_10_min(t0, t0 + 36 * 3600)
    eps = [e for e in _episodes(coded, tz=zone) if e["date"] == day.isoformat()]
    keys = [e["key"] for e in eps]
    assert len(eps) == expected
    assert keys == _independent_local_hours(tz, day)
    assert len(set(keys)) == len(keys)
    for k in present:
        assert k in keys
    for prefix in absent:
        assert not any(k.startswith(prefix) for k in keys)


@pytest.mark.parametrize("zone,day,expected,present,absent", DST_DAYS)
def test_every_local_hour_is_one_utc_hour_long_on_dst_days(zone, day, expected, present, absent):
    tz = ZoneInfo(zone)
    t0 = datetime(day.year, day.month, day.day, tzinfo=tz).timestamp()
    starts = [t for t, _ in local_hour_starts(tz, t0, t0 + 26 * 3600)]
    assert all(b - a == 3600 for a, b in pairwise(starts))


def test_repeated_autumn_hour_has_two_episodes_with_different_utc():
    coded = _places_every_10_min(_utc(2026, 10, 24, 20), _utc(2026, 10, 25, 6))
    eps = [e for e in _episodes(coded, tz="Europe/London") if e["date"] == "2026-10-25" and e["hour"] == 1]
    assert [e["key"] for e in eps] == ["2026-10-25T01:00+01:00", "2026-10-25T01:00+00:00"]
    assert eps[1]["utc"] - eps[0]["utc"] == 3600
    assert eps[0]["utc"] == _utc(2026, 10, 25, 0)  # 01:00 BST is 00:00 UTC


def test_half_hour_zone_hours_start_on_the_half_hour():
    # Asia/Kolkata is UTC+05:30 all year (tz database)
    coded = _places_every_10_min(_utc(2026, 6, 1, 0), _utc(2026, 6, 1, 6))
    eps = _episodes(coded, tz="Asia/Kolkata")
    assert all(e["utc"] % 3600 == 1800 for e in eps)
    assert eps[0]["key"].endswith("+05:30")


def test_hour_key_carries_the_offset():
    loc = datetime(2026, 7, 1, 9, tzinfo=ZoneInfo("Atlantic/Azores"))
    assert hour_key(loc) == "2026-07-01T09:00+00:00"  # Azores summer time is UTC+0


def test_fields_of_one_episode():
    t0 = _utc(2026, 11, 4, 14)  # a Wednesday
    eps = _episodes(_places_every_10_min(t0, t0 + 3600, "P3"), start=_utc(2026, 11, 2))
    assert len(eps) == 1
    e = eps[0]
    assert e["key"] == "2026-11-04T14:00+00:00"
    assert (e["utc"], e["date"], e["hour"], e["weekday"], e["week"]) == (t0, "2026-11-04", 14, 2, 1)
    assert e["place"] == "P3" and e["sound"] is None and e["motion"] is None and e["moods"] == []
    assert e["coverage"] == {"gps_s": 3600.0, "audio_n": 0, "accel_s": 0.0, "mood": False}


def test_study_week_counts_from_the_start_date():
    assert study_week(date(2026, 11, 2), date(2026, 11, 2)) == 1
    assert study_week(date(2026, 11, 8), date(2026, 11, 2)) == 1
    assert study_week(date(2026, 11, 9), date(2026, 11, 2)) == 2
    assert study_week(date(2026, 11, 1), date(2026, 11, 2)) == 1  # before the start: clamped


def test_study_week_defaults_to_the_first_data_time():
    t0 = _utc(2026, 11, 2, 10)
    coded = _places_every_10_min(t0, t0 + 3600) + _places_every_10_min(t0 + 7 * 86400, t0 + 7 * 86400 + 3600)
    assert [e["week"] for e in _episodes(coded)] == [1, 2]


def test_dominant_place_is_the_one_with_most_time():
    t0 = _utc(2026, 11, 2, 10)
    coded = [{"kind": "place", "t": t0 - 600, "t_end": t0 + 1200, "id": "P1"},   # 20 min inside
             {"kind": "place", "t": t0 + 1200, "t_end": t0 + 4000, "id": "P2"}]  # 40 min inside
    e = _episodes(coded, now=t0 + 3600)[-1]
    assert e["utc"] == t0 and e["place"] == "P2"
    assert e["coverage"]["gps_s"] == 3600.0


def test_hour_without_stays_has_place_none():
    t0 = _utc(2026, 11, 2, 10)
    coded = [{"kind": "sound", "t": t0 + 60, "t_end": t0 + 63, "id": "S2"}]
    [e] = _episodes(coded)
    assert e["place"] is None and e["sound"] == "S2" and e["coverage"]["gps_s"] == 0.0


def test_dominant_sound_and_motion_are_the_modes():
    t0 = _utc(2026, 11, 2, 10)
    coded = [{"kind": "sound", "t": t0 + 600 * i, "t_end": t0 + 600 * i + 3, "id": s}
             for i, s in enumerate(["S1", "S2", "S2", "S3", "S2", "S1"])]
    coded += [{"kind": "motion", "t": t0 + 10 * i, "t_end": t0 + 10 * i + 10, "id": m}
              for i, m in enumerate(["light"] * 2 + ["sedentary"] * 3)]
    [e] = _episodes(coded)
    assert e["sound"] == "S2" and e["motion"] == "sedentary"
    assert e["coverage"]["audio_n"] == 6 and e["coverage"]["accel_s"] == 50.0


def test_mode_ties_are_broken_by_label_order():
    t0 = _utc(2026, 11, 2, 10)
    coded = [{"kind": "sound", "t": t0 + 600 * i, "t_end": t0 + 600 * i + 3, "id": s}
             for i, s in enumerate(["S10", "S2"])]
    [e] = _episodes(coded)
    assert e["sound"] == "S2"


def test_moods_come_from_the_nearest_prompt_in_the_window():
    t0 = _utc(2026, 11, 2, 10)
    coded = _places_every_10_min(t0, t0 + 3600)
    moods = [{"t": t0 + 1800 + 80 * 60, "ratings": {"happy": 7, "calm": 1, "tired": 1}},
             {"t": t0 + 1800 - 30 * 60, "ratings": {"happy": 1, "calm": 6, "tired": 5}}]
    eps = _episodes(coded, moods)
    e = eps[0]
    assert e["moods"] == ["calm", "tired"] and e["coverage"]["mood"] is True
    # the later prompt lies inside 11:00-12:00, so that hour is a (mood-only) episode too
    assert eps[1]["hour"] == 11 and eps[1]["place"] is None and eps[1]["moods"] == ["happy"]


def test_mood_rating_at_the_threshold_counts_as_present():
    t0 = _utc(2026, 11, 2, 10)
    moods = [{"t": t0 + 1800, "ratings": {"happy": 5, "calm": 4, "tired": 6}}]
    [e] = _episodes(_places_every_10_min(t0, t0 + 3600), moods, present_at=5)
    assert e["moods"] == ["happy", "tired"]


def test_prompt_outside_the_window_sets_no_moods():
    t0 = _utc(2026, 11, 2, 10)
    moods = [{"t": t0 + 1800 + 91 * 60, "ratings": {"happy": 7, "calm": 7, "tired": 7}}]
    e = _episodes(_places_every_10_min(t0, t0 + 3600), moods)[0]
    assert e["moods"] == [] and e["coverage"]["mood"] is False


def test_emotions_outside_the_policy_are_ignored():
    t0 = _utc(2026, 11, 2, 10)
    moods = [{"t": t0 + 1800, "ratings": {"happy": 7, "smug": 7}}]
    [e] = _episodes(_places_every_10_min(t0, t0 + 3600), moods)
    assert e["moods"] == ["happy"]


def test_incomplete_hour_is_not_an_episode():
    t0 = _utc(2026, 11, 2, 10)
    coded = _places_every_10_min(t0, t0 + 2 * 3600)
    assert [e["hour"] for e in _episodes(coded, now=t0 + 3600 + 1800)] == [10]
    assert [e["hour"] for e in _episodes(coded, now=t0 + 2 * 3600)] == [10, 11]


def test_hour_without_any_data_is_not_an_episode():
    t0 = _utc(2026, 11, 2, 10)
    coded = _places_every_10_min(t0, t0 + 3600) + _places_every_10_min(t0 + 3 * 3600, t0 + 4 * 3600)
    assert [e["hour"] for e in _episodes(coded)] == [10, 13]


def test_unknown_coded_kind_is_refused():
    with pytest.raises(ValueError, match="coded row kind"):
        _episodes([{"kind": "smell", "t": 0, "t_end": 1, "id": "X"}])


def test_no_data_gives_no_episodes():
    assert _episodes([]) == []


# -- with the vault ------------------------------------------------------------------------

def _vault(home):
    from agent.vault import Vault

    return Vault.open(home)


def test_build_episodes_is_idempotent(home, default_policy):
    t0 = _utc(2026, 11, 2, 10)
    with _vault(home) as v:
        for i, r in enumerate(_places_every_10_min(t0, t0 + 5 * 3600)):
            v.put("coded", f"s{i}", r)
        v.put("mood_reports", "m:0", {"t": t0 + 1800, "ratings": {"calm": 7}})
        a = build_episodes(home, default_policy, v, now=t0 + 6 * 3600)
        b = build_episodes(home, default_policy, v, now=t0 + 6 * 3600)
        assert a == b and len(a) == 5
        assert v.count("episodes") == 5
        assert load_episodes(v)[0]["moods"] == ["calm"]


def test_build_episodes_uses_the_home_zone(home, default_policy):
    home.update_config(timezone="America/New_York")
    t0 = _utc(2026, 11, 2, 15)
    with _vault(home) as v:
        for i, r in enumerate(_places_every_10_min(t0, t0 + 3600)):
            v.put("coded", f"s{i}", r)
        [e] = build_episodes(home, default_policy, v, now=t0 + 3600)
    assert e["key"] == "2026-11-02T10:00-05:00"


def test_build_episodes_week_from_enrolment(home, default_policy):
    home.update_config(enrolled_at="2026-10-26T09:00:00Z")
    t0 = _utc(2026, 11, 2, 15)
    with _vault(home) as v:
        for i, r in enumerate(_places_every_10_min(t0, t0 + 3600)):
            v.put("coded", f"s{i}", r)
        [e] = build_episodes(home, default_policy, v, now=t0 + 3600)
    assert e["week"] == 2


def test_settled_rows_are_dropped_after_their_episodes(home, default_policy):
    t0 = _utc(2026, 11, 2, 10)
    days = default_policy.retention.feature_days
    with _vault(home) as v:
        for i, r in enumerate(_places_every_10_min(t0, t0 + 3600)):
            v.put("coded", f"s{i}", r)
        v.put("mood_reports", "m:0", {"t": t0 + 1800, "ratings": {"calm": 7}})
        build_episodes(home, default_policy, v, now=t0 + 7200)
        assert v.count("coded") == 6 and v.count("mood_reports") == 1
        eps = build_episodes(home, default_policy, v, now=t0 + days * 86400 + 4 * 3600)
        assert v.count("coded") == 0 and v.count("mood_reports") == 0
        assert len(eps) == 1 and eps[0]["moods"] == ["calm"]  # the episode stays
