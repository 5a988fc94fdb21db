"""What the participant's page shows, in plain words, as plain data for the templates.

No function here touches the web: each takes the home (and an open vault where
needed) and returns dicts and strings the templates print.  Internal terms
(codebook, episodes, ledger, featurised...) stay out of every string.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import secrets
import time

from ...home import Home

KIND_WORDS = {"audio": "sound snippets", "gps": "location files", "accel": "movement files",
              "mood": "mood answers", "unknown": "unrecognised files"}
DURATIONS = (("30m", "30 minutes", 1800.0), ("2h", "2 hours", 7200.0), ("8h", "8 hours", 28800.0),
             ("1d", "a day", 86400.0), ("3d", "3 days", 3 * 86400.0), ("open", "until I resume", None))


def local_text(t: float | None, zone, with_date: bool = True) -> str:
    """``"Wed 2 Dec, 14:05"`` in the participant's zone (or ``"-"``)."""
    if t is None:
        return "-"
    d = _dt.datetime.fromtimestamp(float(t), zone)
    return d.strftime("%a %-d %b, %H:%M") if with_date else d.strftime("%H:%M")


# ----------------------------------------------------------------------------- today
def today(home: Home, now: float | None = None) -> dict:
    from ..prompts import PromptBook
    from ..status import collect_status

    now = time.time() if now is None else float(now)
    st = collect_status(home, now=now)
    zone = home.timezone()
    ic = st["intake"]
    kinds = []
    for kind in ("audio", "gps", "accel", "mood", "unknown"):
        got = ic["received"].get(kind, 0)
        if got or kind != "unknown":
            kinds.append({"what": KIND_WORDS[kind], "arrived": got,
                          "destroyed": ic["destroyed"].get(kind, 0),
                          "unreadable": ic["rejected"].get(kind, 0)})
    a = st["agent"]
    if a["paused"]:
        state = ("paused until " + local_text(a["paused_until"], zone)) if a.get("paused_until") else \
            "paused until you resume"
    elif a["running"]:
        state = "running"
    else:
        state = "not running in the background"
    book = PromptBook(home)
    pc = book.counts(now)
    attention: list[tuple[str, str | None]] = []
    due: list[str] = []
    if book.open_prompt(now):
        attention.append(("A mood question is waiting for your answer.", "/feel"))
    inbox = ic["inbox"]
    if inbox["files"] and inbox["oldest_age_s"] and inbox["oldest_age_s"] > inbox["limit_s"]:
        attention.append((f"{inbox['files']} file(s) have waited in the inbox longer than the "
                          f"{inbox['limit_s']:g} seconds allowed. Is lethe running?", None))
    if not a["running"] and not a["paused"]:
        attention.append(("lethe is not running in the background, so nothing arriving is taken in. "
                          "Start it with 'lethe service install' (or 'lethe run' in a terminal).", None))
    v = st.get("vault") or {}
    q = v.get("quiz") or {}
    if q.get("pending"):
        attention.append((f"{q['pending']} memory test question(s) are waiting.", "/test"))
    ex = v.get("exports") or {}
    if ex.get("next_due") == "now":
        attention.append(("Your first summary for the study can be prepared.", "/leaves"))
    elif ex.get("next_due"):
        due.append(f"Next summary for the study: from {ex['next_due']}.")
    if pc["next"]:
        due.append(f"Next mood question: {local_text(pc['next'], zone)}.")
    return {"state": state, "paused": bool(a["paused"]), "running": bool(a["running"]), "kinds": kinds,
            "waiting": inbox["files"], "limit_s": inbox["limit_s"], "attention": attention, "due": due,
            "prompts": pc, "places": v.get("places", 0), "named": v.get("named_places", 0),
            "quiz": q, "study_id": st["study_id"], "zone": st["timezone"]}


# ----------------------------------------------------------------------------- places
def places(vault) -> list[dict]:
    """Each place with its name and what helps recognise it without a map."""
    from ...places import describe_places

    return describe_places(vault)


def option_label(pid: str, rows: dict[str, dict]) -> str:
    from ...places import option_label as label

    return label(pid, rows)


# ----------------------------------------------------------------------------- mood answers
def write_mood_answer(home: Home, policy, ratings: dict[str, int], now: float | None = None) -> str:
    """Write one mood report into the inbox as ``*.mood.json`` (docs/inbox-formats.md).

    Written under an unfinished name first (``.NAME.part`` inside the inbox,
    which intake leaves alone while it is written and destroys unread should a
    crash leave it behind) and renamed to its final name, so the agent never
    sees half a file.  Returns the file name.
    """
    from ...errors import DataError
    from ...fsutil import write_private

    s = policy.schedule
    emotions = list(s.emotions)
    if sorted(ratings) != sorted(emotions):
        raise DataError(f"a mood answer rates exactly {', '.join(emotions)}; got {', '.join(sorted(ratings))}")
    for k, val in ratings.items():
        if not isinstance(val, int) or isinstance(val, bool) or not s.mood_scale_min <= val <= s.mood_scale_max:
            raise DataError(f"mood answer: {k} = {val!r} is not a whole number from {s.mood_scale_min} "
                            f"to {s.mood_scale_max}")
    now = time.time() if now is None else float(now)
    when = _dt.datetime.fromtimestamp(now, _dt.UTC)
    doc = {"reports": [{"time": when.isoformat(timespec="seconds").replace("+00:00", "Z"),
                        "ratings": {k: int(ratings[k]) for k in emotions}}]}
    name = f"page-{when.strftime('%Y%m%dT%H%M%S')}-{secrets.token_hex(4)}.mood.json"
    tmp = home.inbox / f".{name}.part"
    write_private(tmp, json.dumps(doc).encode())
    os.replace(tmp, home.inbox / name)
    return name


def mood_counts(home: Home) -> dict:
    from ...intake.report import intake_counts

    ic = intake_counts(home)
    return {k: int(ic[k].get("mood", 0)) for k in ("received", "featurised", "rejected", "destroyed")}


def answer_fate(home: Home, last: dict | None) -> str | None:
    """What became of the last answer the page wrote: waiting, taken in, or unreadable."""
    if not last:
        return None
    if (home.inbox / last["file"]).exists():
        return "waiting"
    now, base = mood_counts(home), last.get("baseline", {})
    if now["rejected"] > base.get("rejected", 0) and now["destroyed"] > base.get("destroyed", 0):
        return "unreadable"
    if now["featurised"] > base.get("featurised", 0) and now["destroyed"] > base.get("destroyed", 0):
        return "taken"
    return "moving"


# ----------------------------------------------------------------------------- what leaves
def bundle_state(name: str, up: dict) -> str:
    """One outbox bundle's state in words, from :func:`agent.uploader.queue_status`.

    "sent" only once the study server acknowledged it; "prepared" before.
    """
    if not up.get("server"):
        return "prepared (in the outbox; this study has no server, so copy it to the study as agreed)"
    for s in up.get("sent", []):
        if s["kind"] == "bundle" and s["name"] == name:
            return "sent (the study server confirmed it has it)"
    for f in up.get("failed", []):
        if f["kind"] == "bundle" and f["name"] == name:
            return f"refused by the study server: {f['message']}"
    for w in up.get("prepared", []):
        if w["kind"] == "bundle" and w["name"] == name:
            return "prepared, waiting to be sent" + (f" (tried {w['attempts']} times: {w['last_error']})"
                                                     if w.get("attempts") else "")
    return "prepared (in the outbox, not queued for sending yet)"


def outbox(home: Home) -> dict:
    """Bundles in the outbox with their state, and the uploader's last contact."""
    from ...uploader import queue_status

    zone = home.timezone()
    up = queue_status(home)
    rows = []
    if home.outbox.exists():
        for p in sorted(home.outbox.iterdir()):
            if p.is_file() and p.suffix == ".lethe":
                st = p.stat()
                rows.append({"name": p.name, "bytes": st.st_size, "when": local_text(st.st_mtime, zone),
                             "state": bundle_state(p.name, up)})
    return {"rows": rows, "server": up.get("server"), "last_contact": local_text(up.get("last_contact"), zone)
            if up.get("last_contact") else None, "last_error": up.get("last_error"),
            "waiting": len(up.get("prepared", []))}


def withdraw_counts(home: Home) -> dict:
    """What a withdrawal would destroy, counted without opening any content."""
    n_out = sum(1 for p in home.outbox.iterdir() if p.is_file()) if home.outbox.exists() else 0
    n_in = sum(1 for p in home.inbox.iterdir() if p.is_file()) if home.inbox.exists() else 0
    return {"outbox": n_out, "inbox": n_in}
