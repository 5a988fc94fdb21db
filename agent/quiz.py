"""The on-device memory test: trial generation, the terminal session, answer import, scoring.

A *trial* probes one past local clock hour ("where were you on Tuesday 3 November,
between 14:00 and 15:00?") with ``policy.quiz.options`` places to choose from:
the episode's dominant place and foils drawn from the other places the
participant visited during the study.  Trials and answers are stored encrypted
in the vault (tables ``trials`` and ``answers``) and never leave the device; only
the quiz summary and the fitted model do, when the policy allows.

Rules (documented in ``docs/participant.md``):

* only episodes whose hour ended between ``quiz.min_age_days`` and
  ``quiz.max_age_days`` ago, with a known place that the participant has not
  excluded, are probed;
* no episode is probed twice, across sessions;
* foils are distinct visited places other than the correct one, drawn uniformly
  or in proportion to how often each was visited (``quiz.foils``);
* places the participant merged are shown as the place they were merged into;
* generation is seeded (``quiz.seed`` and the batch number), so the same
  episodes give the same trials.
"""

from __future__ import annotations

import hashlib
import json
import math
import time
from collections import Counter
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

from .errors import DataError, StateError

WEEKDAYS = ("Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday")
MONTHS = ("January", "February", "March", "April", "May", "June", "July", "August",
          "September", "October", "November", "December")


# --------------------------------------------------------------------------- places
def place_view(vault) -> dict:
    """The participant's place table: ``{id: {"name", "merged_into", "exclude"}}``."""
    return {rid: obj for rid, obj in vault.items("place_names")} if vault is not None else {}


def canonical_place(pid, places: dict):
    """Follow merges (``merged_into`` chains) to the place a merged one now stands for."""
    seen = set()
    while pid is not None and pid in places and places[pid].get("merged_into") and pid not in seen:
        seen.add(pid)
        pid = places[pid]["merged_into"]
    return pid


def excluded(pid, places: dict) -> bool:
    return bool(places.get(pid, {}).get("exclude"))


# --------------------------------------------------------------------------- cues
def cue_text(episode: dict) -> str:
    """The probed hour in words, in the participant's local time."""
    start = datetime.fromisoformat(episode["key"])
    end_hour = (start.hour + 1) % 24
    text = (f"{WEEKDAYS[start.weekday()]} {start.day} {MONTHS[start.month - 1]}, "
            f"between {start.hour:02d}:00 and {end_hour:02d}:00")
    if episode.get("repeated_hour"):
        off = start.utcoffset()
        mins = int(off.total_seconds() // 60) if off is not None else 0
        sign = "+" if mins >= 0 else "-"
        text += f" (clock time UTC{sign}{abs(mins) // 60:02d}:{abs(mins) % 60:02d})"
    return text


def _mark_repeated_hours(episodes: list[dict]) -> None:
    """Flag hours whose local date and hour occur twice (the autumn clock change)."""
    counts = Counter((e["date"], e["hour"]) for e in episodes)
    for e in episodes:
        e["repeated_hour"] = counts[(e["date"], e["hour"])] > 1


# --------------------------------------------------------------------------- generation
@dataclass
class TrialPlan:
    trials: list[dict]
    eligible: int
    visited_places: list[str]


def generate_trials(episodes, policy, *, now: float, places: dict | None = None,
                    used_episodes=(), n: int | None = None, batch: int = 0) -> TrialPlan:
    """Draw up to ``n`` new trials from ``episodes``.

    Parameters
    ----------
    episodes : list of dict
        Episode records (``docs/architecture.md``, Episodes).
    policy : Policy
    now : float
        Current time, Unix seconds.
    places : dict, optional
        The participant's place table (names, merges, exclusions).
    used_episodes : iterable of str
        Episode keys already probed; never probed again.
    n : int, optional
        Number of trials; defaults to ``policy.quiz.trials_per_session``.
    batch : int
        Batch number; with ``policy.quiz.seed`` it seeds the draw.
    """
    places = places or {}
    q = policy.quiz
    n = q.trials_per_session if n is None else int(n)
    if n < 1:
        raise DataError(f"number of trials must be at least 1, got {n}")
    episodes = [dict(e) for e in episodes]
    _mark_repeated_hours(episodes)
    for e in episodes:
        e["_place"] = canonical_place(e.get("place"), places)

    visits = Counter(e["_place"] for e in episodes
                     if e["_place"] is not None and not excluded(e["_place"], places))
    visited = sorted(visits)
    if len(visited) < q.options:
        raise StateError(f"the memory test needs at least {q.options} visited places to offer "
                         f"{q.options} options; this device knows {len(visited)} so far")
    used = set(used_episodes)
    lo, hi = now - q.max_age_days * 86400, now - q.min_age_days * 86400
    eligible = [e for e in episodes
                if e["_place"] in visits and e["key"] not in used
                and lo <= e["utc"] + 3600 <= hi]
    eligible.sort(key=lambda e: e["utc"])
    import numpy as np  # here, not at module level: `lethe status` imports this module for score()

    rng = np.random.default_rng([q.seed, batch])
    take = min(n, len(eligible))
    chosen = sorted(rng.choice(len(eligible), size=take, replace=False)) if take else []
    trials = []
    for i in chosen:
        e = eligible[int(i)]
        correct = e["_place"]
        pool = [p for p in visited if p != correct]
        if q.foils == "frequency":
            w = np.array([visits[p] for p in pool], dtype=float)
            foils = list(rng.choice(pool, size=q.options - 1, replace=False, p=w / w.sum()))
        else:
            foils = list(rng.choice(pool, size=q.options - 1, replace=False))
        options = [correct] + [str(f) for f in foils]
        options = [options[j] for j in rng.permutation(len(options))]
        tid = hashlib.sha256(f"{q.seed}:{e['key']}".encode()).hexdigest()[:12]
        trials.append({
            "trial_id": tid, "episode": e["key"], "date": e["date"], "hour": e["hour"],
            "weekday": e["weekday"], "week": e["week"], "cue_text": cue_text(e),
            "options": options, "correct": correct, "issued_at": float(now),
        })
    return TrialPlan(trials=trials, eligible=len(eligible), visited_places=visited)


def issue_trials(vault, policy, *, now: float | None = None, n: int | None = None) -> list[dict]:
    """Generate and store a new batch of trials from the vault's episodes."""
    now = time.time() if now is None else now
    episodes = [e for _, e in vault.items("episodes")]
    existing = [t for _, t in vault.items("trials")]
    plan = generate_trials(episodes, policy, now=now, places=place_view(vault),
                           used_episodes={t["episode"] for t in existing}, n=n,
                           batch=len(existing))
    with vault.transaction():
        for t in plan.trials:
            vault.put("trials", t["trial_id"], t)
    return plan.trials


def pending_trials(vault) -> list[dict]:
    """Issued trials without an answer, oldest first."""
    answered = {rid for rid, _ in vault.items("answers")}
    return [t for rid, t in vault.items("trials") if rid not in answered]


# --------------------------------------------------------------------------- answers
def record_answer(vault, trial: dict, choice, rt_s: float, source: str, now: float | None = None) -> dict:
    if choice is not None and choice not in trial["options"]:
        raise DataError(f"trial {trial['trial_id']}: {choice!r} is not one of its options {trial['options']}")
    ans = {"trial_id": trial["trial_id"], "choice": choice, "rt_s": float(rt_s),
           "answered_at": float(time.time() if now is None else now), "source": source}
    if not vault.put("answers", trial["trial_id"], ans):
        raise DataError(f"trial {trial['trial_id']} has already been answered")
    return ans


def import_answers(vault, path, *, now: float | None = None) -> int:
    """Import answers collected by another front end, validated strictly.

    The file is JSON (``{"answers": [{"trial_id", "choice", "rt_s"}, ...]}``) or
    CSV with the header ``trial_id,choice,rt_s``; ``choice`` is a place id from the
    trial's options, or empty/null for a skipped trial.  Every row is checked
    before anything is stored: an unknown trial, an option the trial did not
    offer, a duplicate in the file or an already answered trial is an error
    naming the file and the row, and nothing is imported.
    """
    path = Path(path)
    rows = _read_answer_rows(path)
    trials = {rid: t for rid, t in vault.items("trials")}
    answered = {rid for rid, _ in vault.items("answers")}
    seen = set()
    clean = []
    for where, row in rows:
        tid = row.get("trial_id")
        if not isinstance(tid, str) or tid not in trials:
            raise DataError(f"{path}: {where}: unknown trial {tid!r} (this device issued no such trial)")
        if tid in seen:
            raise DataError(f"{path}: {where}: trial {tid} appears twice in the file")
        if tid in answered:
            raise DataError(f"{path}: {where}: trial {tid} has already been answered on this device")
        seen.add(tid)
        choice = row.get("choice")
        if choice in ("", None):
            choice = None
        elif choice not in trials[tid]["options"]:
            raise DataError(f"{path}: {where}: trial {tid}: choice {choice!r} is not one of the "
                            f"options it offered ({', '.join(trials[tid]['options'])})")
        try:
            rt = float(row.get("rt_s", "nan") if row.get("rt_s") not in ("", None) else "nan")
        except (TypeError, ValueError):
            raise DataError(f"{path}: {where}: rt_s {row.get('rt_s')!r} is not a number of seconds") from None
        if not (math.isnan(rt) or 0 <= rt < 86400):
            raise DataError(f"{path}: {where}: rt_s {rt} is outside [0, 86400) seconds")
        clean.append((trials[tid], choice, rt))
    with vault.transaction():
        for trial, choice, rt in clean:
            record_answer(vault, trial, choice, rt, "import", now=now)
    return len(clean)


def _read_answer_rows(path: Path):
    try:
        text = path.read_text("utf-8")
    except FileNotFoundError:
        raise DataError(f"{path}: no such answers file") from None
    except (OSError, UnicodeDecodeError) as e:
        raise DataError(f"{path}: cannot read as UTF-8 text ({e})") from None
    if path.suffix.lower() == ".json":
        try:
            doc = json.loads(text)
        except json.JSONDecodeError as e:
            raise DataError(f"{path}: not valid JSON: {e}") from None
        if not isinstance(doc, dict) or not isinstance(doc.get("answers"), list):
            raise DataError(f'{path}: expected {{"answers": [...]}} at the top level')
        out = []
        for i, row in enumerate(doc["answers"]):
            if not isinstance(row, dict):
                raise DataError(f"{path}: answers[{i}]: expected an object with trial_id, choice, rt_s")
            unknown = set(row) - {"trial_id", "choice", "rt_s"}
            if unknown:
                raise DataError(f"{path}: answers[{i}]: unknown field(s) {sorted(unknown)}")
            out.append((f"answers[{i}]", row))
        return out
    if path.suffix.lower() == ".csv":
        import csv
        import io

        reader = csv.DictReader(io.StringIO(text))
        if reader.fieldnames is None or set(reader.fieldnames) != {"trial_id", "choice", "rt_s"}:
            raise DataError(f"{path}: expected the CSV header trial_id,choice,rt_s, got {reader.fieldnames}")
        return [(f"line {i + 2}", row) for i, row in enumerate(reader)]
    raise DataError(f"{path}: answers must be a .json or .csv file")


# --------------------------------------------------------------------------- scoring
def score(vault, policy) -> dict:
    """The participant's score against chance (one-sided exact binomial test)."""
    from .stats import binomial_upper_tail

    trials = {rid: t for rid, t in vault.items("trials")}
    answers = [a for _, a in vault.items("answers")]
    answered = [a for a in answers if a["choice"] is not None]
    correct = sum(1 for a in answered if trials[a["trial_id"]]["correct"] == a["choice"])
    chance = 1.0 / policy.quiz.options
    out = {"issued": len(trials), "answered": len(answered),
           "skipped": len(answers) - len(answered), "pending": len(trials) - len(answers),
           "correct": correct, "chance": chance,
           "accuracy": (correct / len(answered)) if answered else None, "p_value": None}
    if answered:
        out["p_value"] = binomial_upper_tail(correct, len(answered), chance)
    return out


def score_text(s: dict) -> str:
    """The score in plain words (the test statistic stays in ``--json``)."""
    if not s["answered"]:
        return "No answers yet."
    line = (f"You placed {s['correct']} of {s['answered']} hours correctly "
            f"({100 * s['accuracy']:.0f}%); guessing would get about {100 * s['chance']:.0f}%.")
    if s["p_value"] is not None and s["p_value"] < 0.05:
        line += " That is clearly better than guessing."
    return line


# --------------------------------------------------------------------------- terminal
def run_session(vault, policy, *, read=input, write=print, clock=time.monotonic,
                now: float | None = None) -> dict:
    """Administer pending trials in a plain terminal.

    Each trial shows its cue and numbered options (the participant's own place
    names; an unnamed place is described by when it is usually visited); the
    participant types a number, ``s`` when not sure or ``q`` to stop and
    resume later.  The counter ``[k/n]`` counts this session's questions.  Returns the session
    counts and the overall score.
    """
    from .places import describe_places, option_label

    todo = pending_trials(vault)
    if not todo:
        todo = issue_trials(vault, policy, now=now)
    described = {r["id"]: r for r in describe_places(vault)}
    answered = skipped = 0
    if not todo:
        write("No hours are ready to ask about yet (the test asks about hours "
              f"{policy.quiz.min_age_days:g} to {policy.quiz.max_age_days:g} days ago).")
        return {"answered": 0, "skipped": 0, "stopped": False, "score": score(vault, policy)}
    n = len(todo)
    write(f"Memory test: {n} question{'s' if n != 1 else ''} to go. Type the number of your answer, "
          "'s' if you are not sure, 'q' to stop and carry on later.")
    stopped = False
    for k, trial in enumerate(todo):
        write("")
        write(f"[{k + 1}/{n}] Where were you on {trial['cue_text']}?")
        for i, pid in enumerate(trial["options"], 1):
            write(f"  {i}. {option_label(pid, described)}")
        t0 = clock()
        while True:
            try:
                reply = read("answer> ").strip().lower()
            except EOFError:
                reply = "q"
            if reply in ("q", "quit"):
                stopped = True
                break
            if reply in ("s", "skip"):
                record_answer(vault, trial, None, clock() - t0, "terminal")
                skipped += 1
                break
            if reply.isdigit() and 1 <= int(reply) <= len(trial["options"]):
                record_answer(vault, trial, trial["options"][int(reply) - 1], clock() - t0, "terminal")
                answered += 1
                break
            write(f"Please type a number from 1 to {len(trial['options'])}, 's' (not sure) or 'q' (stop).")
        if stopped:
            write("Stopped; run 'lethe quiz' again to continue where you left off.")
            break
    s = score(vault, policy)
    if not stopped:
        write("")
        write("Done. " + score_text(s))
    return {"answered": answered, "skipped": skipped, "stopped": stopped, "score": s}
