"""``lethe status``: what the agent holds, what is waiting, what will leave and when.

Reads only what it needs: the ledger (no key), the inbox listing (no file is
opened), and the vault's table counts and summaries.  Shows no content: counts,
ages, fingerprints, dates.
"""

from __future__ import annotations

import datetime as _dt
import time

from ..fsutil import is_locked
from ..home import Home


def agent_running(home: Home) -> bool | None:
    """Whether another process holds the agent lock (None when unknown)."""
    return is_locked(home.lock_path)


def collect_status(home, now: float | None = None, passphrase=None) -> dict:
    from ..intake.report import intake_counts
    from ..pause import read_pause, is_paused

    home = home if isinstance(home, Home) else Home(home)
    home.require()
    now = time.time() if now is None else float(now)
    policy = home.load_policy()
    cfg = home.read_config()
    pause = read_pause(home)
    st = {
        "home": str(home.root),
        "study_id": cfg.get("study_id"), "pseudonym": cfg.get("pseudonym"),
        "timezone": cfg.get("timezone"),
        "enrolled": _date(cfg.get("enrolled_at")),
        "agent": {"running": agent_running(home), "paused": is_paused(home, now),
                  "paused_until": pause.get("until") if pause.get("paused") else None},
        "policy": {"name": policy.policy.name, "version": policy.policy.version,
                   "fingerprint": policy.fingerprint, "raw_retention_s": policy.retention.raw_seconds},
        "intake": intake_counts(home, policy, now=now),
        "disk_bytes": home.disk_usage(),
        "keys": _keys_part(home),
    }
    if (home.state / "prompts.json").exists():
        from .prompts import PromptBook

        st["prompts"] = PromptBook(home, policy).counts(now)
    from ..uploader import queue_status

    st["upload"] = queue_status(home)
    if home.vault_path.exists():
        from ..vault import Vault

        with Vault.open(home, passphrase=passphrase) as v:
            st["vault"] = _vault_part(v, policy, now)
    return st


def _keys_part(home: Home) -> dict:
    """How the keys are held (no secret is read) and the ledger's integrity alarms."""
    from ..keystore import key_storage

    storage = key_storage(home)
    out = {"storage": storage, "warning": None}
    if storage == "plain":
        out["warning"] = ("the keys are plain files (chosen at 'lethe init'): anyone who copies this home "
                          "can read the vault and sign as this device")
    return out


def _vault_part(v, policy, now: float) -> dict:
    from ..quiz import score

    places = {e.get("place") for _, e in v.items("episodes") if e.get("place")}
    out = {"places": len(places), "named_places": v.count("place_names"),
           "episodes": v.count("episodes"), "quiz": score(v, policy)}
    try:
        from ..codebook import codebook_quality

        out["codebook"] = codebook_quality(v)
    except ImportError:  # pragma: no cover - codebook always ships
        out["codebook"] = None
    exports = sorted((rec for _, rec in v.items("exports")), key=lambda r: r.get("seq", 0))
    last = exports[-1] if exports else None
    out["exports"] = {"count": len(exports), "last": last.get("created") if last else None,
                      "epsilon_spent": round(sum(float(r.get("epsilon") or 0) for r in exports), 6)}
    cadence = policy.export.cadence_days
    if last and cadence > 0:
        try:
            last_day = _dt.date.fromisoformat(str(last.get("created"))[:10])
            out["exports"]["next_due"] = (last_day + _dt.timedelta(days=cadence)).isoformat()
        except ValueError:
            out["exports"]["next_due"] = None
    else:
        out["exports"]["next_due"] = "now" if cadence > 0 else None
    fits = v.get("fits", "latest")
    out["model_fitted"] = fits is not None
    return out


def _date(t) -> str | None:
    if t is None:
        return None
    return _dt.datetime.fromtimestamp(float(t), _dt.UTC).date().isoformat()


def _n(d: dict, kind: str) -> int:
    return int(d.get(kind, 0))


_KEY_WORDS = {"keyring": "held by this laptop's keyring", "passphrase": "locked with your passphrase",
              "plain": "plain files", "none": "none yet"}

KIND_WORDS = {"audio": "sound snippets", "gps": "location files", "accel": "movement files",
              "mood": "mood answers", "unknown": "unrecognised files"}


def status_text(st: dict) -> str:
    """The status in plain words for the participant (``--json`` keeps every figure)."""
    from zoneinfo import ZoneInfo

    zone = ZoneInfo(st.get("timezone") or "UTC")
    a = st["agent"]
    state = "paused" if a["paused"] else ("running" if a["running"] else "not running in the background")
    if a["paused"]:
        state += (" until " + _dt.datetime.fromtimestamp(a["paused_until"], zone).strftime("%a %d %b %H:%M")
                  if a.get("paused_until") else " until you resume")
    p = st["policy"]
    lines = [
        f"Study {st['study_id']}, you are {st['pseudonym']} (joined {st['enrolled']}; times in {st['timezone']}).",
        f"lethe is {state}.",
        f"Rules in force: {p['name']} {p['version']}.",
        f"Keys: {_KEY_WORDS.get(st.get('keys', {}).get('storage'), 'unknown')}.",
    ]
    if st.get("keys", {}).get("warning"):
        lines.append(f"WARNING: {st['keys']['warning']}.")
    lines += [
        "",
        "Since you joined      arrived  destroyed  could not be read",
    ]
    ic = st["intake"]
    for kind in ("audio", "gps", "accel", "mood", "unknown"):
        row = [ic.get(k, {}).get(kind, 0) for k in ("received", "destroyed", "rejected")]
        if any(row) or kind != "unknown":
            lines.append(f"  {KIND_WORDS[kind]:19s} {row[0]:7d} {row[1]:10d} {row[2]:18d}")
    inbox = ic["inbox"]
    if inbox["files"]:
        lines.append(f"Waiting in the inbox: {inbox['files']} file(s); the oldest for {inbox['oldest_age_s']:.0f} s "
                     f"(none may stay longer than {inbox['limit_s']:g} s).")
        parts = []
        if inbox.get("in_subfolders"):
            parts.append(f"{inbox['in_subfolders']} in folders inside the inbox")
        if inbox.get("unfinished"):
            parts.append(f"{inbox['unfinished']} not finished by the recorder yet (.part or hidden), "
                         f"destroyed unread if not finished in time")
        if parts:
            lines.append("  Of these: " + "; ".join(parts) + ".")
    else:
        lines.append(f"The inbox is empty (no file may stay there longer than {inbox['limit_s']:g} s).")
    alarm = ic.get("alarm")
    if alarm:
        lines.append(f"WARNING: the record of what happened to your files could not be written "
                     f"({alarm.get('error', '?')}); {alarm.get('pending', 0)} entries wait. Raw files are "
                     f"still destroyed on time; free disk space or run 'lethe audit verify'.")
    pr = st.get("prompts")
    if pr:
        lines.append(f"Mood questions: {pr['asked']} asked, {pr['answered']} answered, {pr['missed']} missed"
                     + (f", {pr['open']} waiting for you" if pr["open"] else "") + ".")
    v = st.get("vault")
    if v:
        q = v["quiz"]
        e = v["exports"]
        due = e.get("next_due")
        lines += [
            f"Places: {v['places']} found, {v['named_places']} named by you.",
            f"Memory test: {q['answered']} answered, {q['skipped']} not sure, {q['pending']} waiting.",
            f"Summaries for the study: {_summaries_made(e['count'], st.get('upload'))}, "
            f"last {e['last'] or 'never'}; next " + ("can be prepared now" if due == "now" else f"from {due or '-'}")
            + ".",
        ]
    lines.extend(upload_lines(st.get("upload")))
    lines.append(f"Space used on this laptop: {st['disk_bytes'] / 1e6:.1f} MB.")
    lines.append("'lethe open' shows all this on your own page.")
    return "\n".join(lines)


def _summaries_made(count: int, up: dict | None) -> str:
    """How many summaries were made, split the way the upload queue sees them.

    With a study server, a summary is "prepared" until the server acknowledged
    it and "sent" after (the same words as :func:`upload_lines`); without one,
    every summary stays in the outbox for the participant to hand over.
    """
    if not up or not up.get("server"):
        return f"{count} prepared (in the outbox)"
    sent = sum(1 for i in up.get("sent", []) if i.get("kind") == "bundle")
    waiting = sum(1 for i in up.get("prepared", []) if i.get("kind") == "bundle")
    return f"{count} made ({sent} sent, {waiting} prepared and waiting)"


def upload_lines(up: dict | None) -> list[str]:
    """The uploader's state in plain words: "prepared" until the server acknowledged, "sent" after."""
    if not up or not up.get("server"):
        return ["Sending: the study card names no study server, so lethe sends nothing; "
                "hand the files in the outbox to the study as agreed."]
    out = [f"Sending to the study server {up['server']}: {len(up['sent'])} sent (the server confirmed it has "
           f"them), {len(up['prepared'])} prepared and waiting."]
    for i in up["prepared"][:5]:
        out.append(f"  Waiting: {i['kind']} {i['name']}" + (f" (tried {i['attempts']} times: {i['last_error']})"
                                                            if i["attempts"] else "") + ".")
    for f in up["failed"][:5]:
        out.append(f"  Refused by the study server: {f['kind']} {f['name']}: {f['message']}")
    if up.get("last_contact"):
        t = _dt.datetime.fromtimestamp(up["last_contact"], _dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
        out.append(f"  Last contact with the study server: {t}.")
    else:
        out.append("  No contact with the study server yet.")
    return out
