"""Mood-prompt schedule: count per day, spacing, waking hours and clock-change days, checked with zoneinfo."""

from __future__ import annotations

import datetime as dt
import itertools
from zoneinfo import ZoneInfo

import pytest

from agent.errors import DataError
from agent.participant.prompts import PromptBook, check_waking, min_spacing_s, schedule_day

SEED = bytes(range(32))
HOUR = 3600.0


def local(t: float, zone: str) -> dt.datetime:
    return dt.datetime.fromtimestamp(t, ZoneInfo(zone))


def window(day: dt.date, start: tuple[int, int], end: tuple[int, int], zone: str) -> tuple[float, float]:
    """The waking window built directly with zoneinfo (independent of the code under test)."""
    z = ZoneInfo(zone)
    return (dt.datetime(day.year, day.month, day.day, *start, tzinfo=z).timestamp(),
            dt.datetime(day.year, day.month, day.day, *end, tzinfo=z).timestamp())


@pytest.mark.parametrize("zone", ["Europe/Lisbon", "America/New_York", "Asia/Kolkata", "Pacific/Chatham"])
@pytest.mark.parametrize("n", [1, 8, 20])
def test_count_spacing_and_waking_hours_on_ordinary_days(zone, n):
    for day in (dt.date(2027, 1, 14), dt.date(2027, 6, 30), dt.date(2027, 12, 31)):
        ps = schedule_day(day, n, ("08:00", "22:00"), ZoneInfo(zone), SEED, 90 * 60)
        assert len(ps) == n
        lo, hi = window(day, (8, 0), (22, 0), zone)
        assert hi - lo == 14 * HOUR  # no clock change on these dates in these zones (tzdata)
        for p in ps:
            assert lo <= p.t < hi
            w = local(p.t, zone)
            assert w.date() == day and dt.time(8, 0) <= w.time() < dt.time(22, 0)
        gaps = [b.t - a.t for a, b in itertools.pairwise(ps)]
        assert all(g >= 14 * HOUR / n / 2 for g in gaps)
        assert min_spacing_s(day, n, ("08:00", "22:00"), ZoneInfo(zone)) == 14 * HOUR / n / 2


def test_spring_forward_day_has_a_shorter_window_and_no_time_in_the_gap():
    # Lisbon, 28 March 2027: 01:00 WET becomes 02:00 WEST (EU rule: last Sunday of March, 01:00 UTC; tzdata)
    day, zone = dt.date(2027, 3, 28), "Europe/Lisbon"
    ps = schedule_day(day, 6, ("00:30", "03:30"), ZoneInfo(zone), SEED, 3600)
    lo, hi = window(day, (0, 30), (3, 30), zone)
    assert hi - lo == 2 * HOUR  # three wall-clock hours, two real ones
    assert len(ps) == 6
    for p in ps:
        assert lo <= p.t < hi
        assert not dt.time(1, 0) <= local(p.t, zone).time() < dt.time(2, 0)  # that hour does not exist
    assert all(b.t - a.t >= 2 * HOUR / 6 / 2 for a, b in itertools.pairwise(ps))


def test_fall_back_day_has_a_longer_window():
    # Lisbon, 31 October 2027: 02:00 WEST becomes 01:00 WET (last Sunday of October, 01:00 UTC; tzdata)
    day, zone = dt.date(2027, 10, 31), "Europe/Lisbon"
    ps = schedule_day(day, 6, ("00:30", "03:30"), ZoneInfo(zone), SEED, 3600)
    lo, hi = window(day, (0, 30), (3, 30), zone)
    assert hi - lo == 4 * HOUR
    assert len(ps) == 6 and all(lo <= p.t < hi for p in ps)
    assert all(b.t - a.t >= 4 * HOUR / 6 / 2 for a, b in itertools.pairwise(ps))


def test_waking_start_inside_the_spring_gap_starts_when_the_clocks_jump():
    # New York, 14 March 2027: 02:00 EST becomes 03:00 EDT (second Sunday of March; tzdata)
    day, zone = dt.date(2027, 3, 14), "America/New_York"
    ps = schedule_day(day, 4, ("02:30", "10:00"), ZoneInfo(zone), SEED, 3600)
    jump = dt.datetime(2027, 3, 14, 7, 0, tzinfo=dt.UTC).timestamp()  # 03:00 EDT
    end = dt.datetime(2027, 3, 14, 10, 0, tzinfo=ZoneInfo(zone)).timestamp()
    assert all(jump <= p.t < end for p in ps) and len(ps) == 4


def test_midnight_as_the_end_of_the_day():
    day, zone = dt.date(2027, 5, 5), "Europe/Lisbon"
    ps = schedule_day(day, 3, ("21:00", "24:00"), ZoneInfo(zone), SEED, 3600)
    assert all(local(p.t, zone).date() == day and local(p.t, zone).hour >= 21 for p in ps)


def test_schedule_is_reproducible_from_the_seed_and_differs_with_another():
    z = ZoneInfo("Europe/Lisbon")
    a = schedule_day(dt.date(2027, 2, 2), 8, ("08:00", "22:00"), z, SEED, 5400)
    assert a == schedule_day(dt.date(2027, 2, 2), 8, ("08:00", "22:00"), z, SEED, 5400)
    assert a != schedule_day(dt.date(2027, 2, 2), 8, ("08:00", "22:00"), z, bytes(32), 5400)
    assert [p.t for p in a] != [p.t - 86400 for p in schedule_day(dt.date(2027, 2, 3), 8, ("08:00", "22:00"), z,
                                                                   SEED, 5400)]


def test_a_prompt_expires_after_the_window_or_at_the_next_prompt():
    z = ZoneInfo("Europe/Lisbon")
    ps = schedule_day(dt.date(2027, 2, 2), 8, ("08:00", "22:00"), z, SEED, 30 * 60)
    for a, b in itertools.pairwise(ps):
        assert a.expires == min(a.t + 30 * 60, b.t)


@pytest.mark.parametrize("start,end", [("25:00", "22:00"), ("8:00", "22:00"), ("08:00", "24:30"),
                                       ("22:00", "08:00"), ("08:00", "08:30"), ("", "22:00")])
def test_bad_waking_hours_are_refused(start, end):
    with pytest.raises(DataError, match="waking"):
        check_waking(start, end)


def test_zero_prompts_is_refused():
    with pytest.raises(DataError, match="at least 1"):
        schedule_day(dt.date(2027, 2, 2), 0, ("08:00", "22:00"), ZoneInfo("UTC"), SEED, 60)


# ----------------------------------------------------------------------------- the home's book
@pytest.fixture
def book(tmp_path):
    from page_home import make_page_home

    root = make_page_home(tmp_path, days=1)
    created = dt.datetime(2027, 2, 2, 0, 0, tzinfo=ZoneInfo("Europe/Lisbon")).timestamp()
    return PromptBook(root, created=created)


def test_open_answered_and_missed_are_counted(book):
    day = dt.date(2027, 2, 2)
    ps = book.day(day)
    assert len(ps) == book.per_day == 8  # policies/default.toml: mood_prompts_per_day = 8
    assert book.open_prompt(ps[0].t - 1) is None
    assert book.open_prompt(ps[0].t + 1) == ps[0]
    book.mark_answered(ps[0].prompt_id, now=ps[0].t + 60)
    assert book.open_prompt(ps[0].t + 120) is None
    after_third = ps[2].expires + 1
    c = book.counts(after_third)
    # The day's times are random: a fourth prompt may already have started (and be open) by then.
    started = [p for p in ps if p.t <= after_third]
    still_open = [p for p in started if after_third < p.expires]
    assert len(started) >= 3 and all(p.expires < after_third for p in ps[:3])
    assert (c["asked"], c["answered"], c["open"]) == (len(started), 1, len(still_open))
    assert c["missed"] == len(started) - 1 - len(still_open) >= 2
    assert book.open_prompt(ps[3].t) == ps[3]
    assert book.counts(ps[3].t)["open"] == 1


def test_only_one_notification_per_prompt(book):
    p = book.day(dt.date(2027, 2, 2))[0]
    assert book.mark_notified(p.prompt_id) is True
    assert book.mark_notified(p.prompt_id) is False


def test_new_waking_hours_apply_from_tomorrow(book):
    now = dt.datetime(2027, 2, 2, 12, 0, tzinfo=ZoneInfo("Europe/Lisbon")).timestamp()
    before = book.day(dt.date(2027, 2, 2))
    res = book.set_waking("10:00", "20:00", now=now)
    assert res["from"] == "2027-02-03"
    assert book.day(dt.date(2027, 2, 2)) == before
    for p in book.day(dt.date(2027, 2, 3)):
        assert 10 <= local(p.t, "Europe/Lisbon").hour < 20
