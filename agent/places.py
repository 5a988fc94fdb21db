"""The participant's own places: names in their own words, merges, exclusions.

The codebook finds places as cluster IDs (``P1``, ``P2``...).  Only the
participant knows what they are.  Names, merges ("P4 and P7 are the same
café") and exclusions ("do not ask me about P9") are stored encrypted in vault
table ``place_names`` and never leave the device.  The listing describes each
place only by when it is usually visited (hours and weekdays), never by
coordinates, and by its typical sound kind and activity.
"""

from __future__ import annotations

from collections import Counter, defaultdict

from .errors import DataError

WEEKDAY_ABBR = ("Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun")
WEEKDAY_WORDS = ("Mondays", "Tuesdays", "Wednesdays", "Thursdays", "Fridays", "Saturdays", "Sundays")
MOTION_WORDS = {"sedentary": "mostly sitting or still", "light": "light activity, such as walking about",
                "mvpa": "brisk activity, such as fast walking or sport"}
MAX_NAME = 80


def list_places(vault) -> list[dict]:
    """Every place seen in the episodes with its usual hours and weekdays."""
    table = {rid: obj for rid, obj in vault.items("place_names")}
    hours: dict[str, Counter] = defaultdict(Counter)
    days: dict[str, Counter] = defaultdict(Counter)
    for _, e in vault.items("episodes"):
        pid = e.get("place")
        if pid:
            hours[pid][e["hour"]] += 1
            days[pid][e["weekday"]] += 1
    for pid in table:
        hours.setdefault(pid, Counter())
    out = []
    for pid in sorted(hours, key=_order):
        rec = table.get(pid, {})
        out.append({
            "id": pid, "name": rec.get("name"), "merged_into": rec.get("merged_into"),
            "exclude": bool(rec.get("exclude")), "hours_seen": sum(hours[pid].values()),
            "usual_hours": usual_hours(hours[pid]), "usual_days": usual_days(days[pid]),
        })
    return out


def _order(pid: str):
    digits = "".join(c for c in pid if c.isdigit())
    return (int(digits) if digits else 0, pid)


def usual_hours(c: Counter, share: float = 0.8) -> str:
    """The smallest set of clock hours covering ``share`` of visits, as ranges ("08-12, 19")."""
    if not c:
        return "-"
    total = sum(c.values())
    picked, acc = [], 0
    for h, n in c.most_common():
        picked.append(h)
        acc += n
        if acc >= share * total:
            break
    picked.sort()
    ranges, start, prev = [], picked[0], picked[0]
    for h in picked[1:] + [None]:
        if h is not None and h == prev + 1:
            prev = h
            continue
        ranges.append(f"{start:02d}" if start == prev else f"{start:02d}-{prev + 1:02d}")
        if h is not None:
            start = prev = h
    return ", ".join(ranges)


def usual_days(c: Counter, share: float = 0.1) -> str:
    if not c:
        return "-"
    total = sum(c.values())
    return " ".join(WEEKDAY_ABBR[d] for d in range(7) if c[d] >= share * total)


def _known(vault, pid: str) -> None:
    if pid not in {p["id"] for p in list_places(vault)}:
        raise DataError(f"no place {pid!r} on this device; 'lethe places' lists the known ones")


def set_name(vault, pid: str, name: str) -> None:
    name = " ".join(str(name).split())
    if not name:
        raise DataError("a place name must not be empty")
    if len(name) > MAX_NAME:
        raise DataError(f"a place name may have at most {MAX_NAME} characters, got {len(name)}")
    _known(vault, pid)
    _update(vault, pid, name=name)


def merge(vault, pid: str, into: str) -> None:
    """Record that ``pid`` is the same place as ``into``; history is kept, not relabelled."""
    if pid == into:
        raise DataError(f"cannot merge {pid} into itself")
    _known(vault, pid)
    _known(vault, into)
    target = vault.get("place_names", into) or {}
    if target.get("merged_into"):
        raise DataError(f"{into} is itself merged into {target['merged_into']}; merge into that instead")
    _update(vault, pid, merged_into=into)


def unmerge(vault, pid: str) -> None:
    _known(vault, pid)
    _update(vault, pid, merged_into=None)


def set_excluded(vault, pid: str, exclude: bool = True) -> None:
    _known(vault, pid)
    _update(vault, pid, exclude=bool(exclude))


def _update(vault, pid: str, **changes) -> None:
    rec = dict(vault.get("place_names", pid) or {"name": None, "merged_into": None, "exclude": False})
    rec.update(changes)
    vault.upsert("place_names", pid, rec)


def hour_ranges(h: Counter, share_of_peak: float = 0.5) -> list[tuple[int, int]]:
    """Clock-hour ranges ``[(start, end), ...]`` (end exclusive) of the hours with at least
    ``share_of_peak`` of the busiest hour's visits; a range through midnight is one range."""
    if not h:
        return []
    peak = max(h.values())
    picked = sorted(k for k, n in h.items() if n >= share_of_peak * peak)
    ranges: list[list[int]] = []
    for k in picked:
        if ranges and ranges[-1][1] == k:
            ranges[-1][1] = k + 1
        else:
            ranges.append([k, k + 1])
    if len(ranges) > 1 and ranges[0][0] == 0 and ranges[-1][1] == 24:
        first = ranges.pop(0)
        ranges[-1][1] = first[1]  # 19 to 24 and 0 to 9 -> 19 to 9, overnight
    return [(a, b) for a, b in ranges]


def hours_words(h: Counter) -> str:
    """``"from 09:00 to 17:00"``, ``"from 19:00 to 09:00"`` (overnight), or ``"-"``."""
    rs = hour_ranges(h)
    if not rs:
        return "-"
    if rs == [(0, 24)]:
        return "at any hour"
    return " and ".join(f"from {a:02d}:00 to {b % 24:02d}:00" for a, b in rs)


def days_words(d: Counter, share: float = 0.1) -> str:
    total = sum(d.values())
    if not total:
        return "-"
    days = [i for i in range(7) if d[i] >= share * total]
    if days == list(range(5)):
        return "weekdays"
    if days == [5, 6]:
        return "weekends"
    if days == list(range(7)):
        return "every day of the week"
    return ", ".join(WEEKDAY_WORDS[i] for i in days)


def describe_places(vault) -> list[dict]:
    """Each place with its name and what helps recognise it without a map.

    Adds to :func:`list_places` rows: ``label`` (the name, or "unnamed place
    N"), ``days`` and ``hours`` in words, the typical ``sound`` (a sound kind,
    named after the other places where it is usual) and ``motion`` (activity in
    words), and ``visits`` (hours seen).
    """
    rows = list_places(vault)
    hours: dict[str, Counter] = defaultdict(Counter)
    days: dict[str, Counter] = defaultdict(Counter)
    sounds: dict[str, Counter] = defaultdict(Counter)
    motions: dict[str, Counter] = defaultdict(Counter)
    for _, e in vault.items("episodes"):
        pid = e.get("place")
        if not pid:
            continue
        hours[pid][e["hour"]] += 1
        days[pid][e["weekday"]] += 1
        if e.get("sound"):
            sounds[pid][e["sound"]] += 1
        if e.get("motion"):
            motions[pid][e["motion"]] += 1
    names = {r["id"]: r["name"] for r in rows}
    # a sound kind is described by the places where it is usual, in the participant's own names
    usual_at: dict[str, list[str]] = defaultdict(list)
    for pid, c in sounds.items():
        if c:
            usual_at[c.most_common(1)[0][0]].append(pid)
    letters = {sid: chr(ord("A") + i) if i < 26 else sid
               for i, sid in enumerate(sorted({s for c in sounds.values() for s in c}, key=_num))}
    out = []
    for r in rows:
        pid = r["id"]
        sc, mc = sounds.get(pid, Counter()), motions.get(pid, Counter())
        if sc:
            sid, n = sc.most_common(1)[0]
            others = [names[p] or _unnamed(p) for p in usual_at[sid] if p != pid]
            sound = f"sound kind {letters[sid]} ({100 * n / sum(sc.values()):.0f}% of your hours here)"
            if others:
                sound += "; the same kind is usual at " + ", ".join(others[:3])
        else:
            sound = "not known"
        if mc:
            mid, n = mc.most_common(1)[0]
            motion = f"{MOTION_WORDS.get(mid, 'activity kind ' + str(mid))} ({100 * n / sum(mc.values()):.0f}%)"
        else:
            motion = "not known"
        out.append({**r, "label": r["name"] or _unnamed(pid), "days": days_words(days.get(pid, Counter())),
                    "hours": hours_words(hours.get(pid, Counter())), "sound": sound, "motion": motion,
                    "visits": r["hours_seen"]})
    return out


def _num(s: str):
    digits = "".join(c for c in s if c.isdigit())
    return (int(digits) if digits else 0, s)


def _unnamed(pid: str) -> str:
    return f"unnamed place {pid.lstrip('P')}"


def option_label(pid: str, rows: dict[str, dict]) -> str:
    """How a memory-test option is shown: the participant's name, else when they are usually there."""
    r = rows.get(pid)
    if r is None:
        return _unnamed(pid)
    if r.get("name"):
        return r["name"]
    return f"{_unnamed(pid)}: usually {r['days']}, {r['hours']}"


def places_text(rows: list[dict]) -> str:
    """The participant's places in words, one block per place (nothing cut short).

    ``rows`` come from :func:`describe_places` (or :func:`list_places`, which
    then shows the usual hours and days in short form).
    """
    if not rows:
        return "No places found yet. They appear after a few days of data."
    names = {r["id"]: r.get("label") or r.get("name") or _unnamed(r["id"]) for r in rows}
    lines = []
    for r in rows:
        lines.append(f"{r['id']:4s} {names[r['id']]}")
        if "days" in r:
            lines.append(f"     usually {r['days']}, {r['hours']} ({r['visits']} hours here)")
            lines.append(f"     sound: {r['sound']}; activity: {r['motion']}")
        else:
            lines.append(f"     usually {r['usual_days']} at {r['usual_hours']} ({r['hours_seen']} hours here)")
        if r["merged_into"]:
            lines.append(f"     the same place as {names.get(r['merged_into'], r['merged_into'])}")
        if r["exclude"]:
            lines.append("     not asked about in the memory test")
    lines.append("")
    lines.append("Name one with: lethe places --name ID \"your name\" (names never leave this laptop).")
    return "\n".join(lines)
