"""The participant's own places: names in their own words, merges, exclusions.

The codebook finds places as cluster IDs (``P1``, ``P2``...).  Only the
participant knows what they are.  Names, merges ("P4 and P7 are the same
café") and exclusions ("do not ask me about P9") are stored encrypted in vault
table ``place_names`` and never leave the device.  The listing describes each
place only by when it is usually visited (hours and weekdays), never by
coordinates.
"""

from __future__ import annotations

from collections import Counter, defaultdict

from .errors import DataError

WEEKDAY_ABBR = ("Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun")
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


def places_text(rows: list[dict]) -> str:
    if not rows:
        return "No places found yet. They appear after a few days of data."
    lines = [f"{'id':5s} {'name':24s} {'usual hours':18s} {'days':28s} note"]
    for r in rows:
        note = []
        if r["merged_into"]:
            note.append(f"same as {r['merged_into']}")
        if r["exclude"]:
            note.append("not used in tests")
        lines.append(f"{r['id']:5s} {(r['name'] or '(unnamed)')[:24]:24s} {r['usual_hours'][:18]:18s} "
                     f"{r['usual_days'][:28]:28s} {'; '.join(note)}")
    return "\n".join(lines)
