"""A plain-language account of a study policy, for participants and ethics boards.

The same summary backs ``lethe policy show`` (what a participant reads before
enrolling) and ``lethe audit policy`` (what a board member reads before the
limits check).  Sentences are short and name units in full; every figure comes
from the resolved policy, so the text cannot drift from what the agent does.
"""

from __future__ import annotations

from dataclasses import dataclass, field

# What each node kind means to a participant.  The code names (P3, S2) are the
# agent's stable IDs; the point is that a code is all that is ever stored.
KIND_WORDS = {
    "hour": "the hour of the day",
    "weekday": "the day of the week",
    "week": "the study week",
    "place": "which of your places you were at (a code such as P3, never the location itself)",
    "sound": "what kind of soundscape was around you (a code such as S2, never the sound itself)",
    "motion": "how active you were (for example still or walking)",
    "mood": "the emotions you reported",
}

KIND_SHORT = {
    "hour": "hour of day", "weekday": "day of week", "week": "study week",
    "place": "place codes", "sound": "sound codes", "motion": "activity codes",
    "mood": "reported emotions",
}

CAUTIONS = (
    "Taking part needs your informed consent, and the study needs the approval of "
    "the ethics board responsible for it. Nothing in this software replaces either.",
    "Data-protection law applies to this study, for example the GDPR in the European Union.",
    "lethe overwrites and deletes each original file, but on SSDs and other flash storage, "
    "on journaling or copy-on-write filesystems, in backups and in cloud-synced folders "
    "this is not guaranteed erasure (see NIST SP 800-88, Guidelines for Media Sanitization). "
    "Keep the inbox out of backups and cloud sync.",
    "Where this summary and local law or the approving board's conditions differ, "
    "the law and the board's conditions apply.",
)


def fmt_number(x) -> str:
    """``30.0`` -> ``"30"``, ``0.5`` -> ``"0.5"``; no trailing zeros."""
    if isinstance(x, bool):
        return str(x).lower()
    if isinstance(x, float) and x.is_integer():
        return str(int(x))
    if isinstance(x, float):
        return f"{x:.6g}"
    return str(x)


def _plural(x, unit: str) -> str:
    return f"{fmt_number(x)} {unit}" + ("" if float(x) == 1.0 else "s")


def fmt_seconds(s: float) -> str:
    """A duration in the largest unit that keeps it readable: ``90`` -> ``"90 seconds"``."""
    s = float(s)
    if s < 120 or s % 60:
        return _plural(s, "second")
    m = s / 60
    if m < 120 or m % 60:
        return _plural(m, "minute")
    h = m / 60
    if h < 48 or h % 24:
        return _plural(h, "hour")
    return _plural(h / 24, "day")


def fmt_minutes(m: float) -> str:
    return fmt_seconds(float(m) * 60)


def fmt_days(d: float) -> str:
    return _plural(d, "day")


def _join(words: list[str]) -> str:
    words = list(words)
    if not words:
        return "nothing"
    if len(words) == 1:
        return words[0]
    return ", ".join(words[:-1]) + " and " + words[-1]


@dataclass
class PolicySummary:
    """The summary: titled sections of sentences, cautions, and the facts behind them.

    Attributes
    ----------
    title : str
        Study and policy name.
    fingerprint : str
        SHA-256 fingerprint of the resolved policy (see ``docs/policy.md``).
    sections : list of (str, list of str)
        Section heading and its sentences, in reading order.
    cautions : list of str
    facts : dict
        The figures the sentences were built from, for machine use (``--json``).
    """

    title: str
    fingerprint: str
    sections: list[tuple[str, list[str]]]
    cautions: list[str]
    facts: dict = field(default_factory=dict)

    def text(self, width: int = 78) -> str:
        import textwrap

        out = [self.title, "=" * min(len(self.title), width), ""]
        for heading, lines in self.sections:
            out.append(heading)
            for line in lines:
                out.extend(textwrap.wrap(line, width, initial_indent="  - ", subsequent_indent="    "))
            out.append("")
        out.append("Cautions")
        for line in self.cautions:
            out.extend(textwrap.wrap(line, width, initial_indent="  ! ", subsequent_indent="    "))
        out.append("")
        out.append(f"Policy fingerprint (SHA-256): {self.fingerprint}")
        return "\n".join(out) + "\n"

    def as_dict(self) -> dict:
        return {
            "title": self.title,
            "fingerprint": self.fingerprint,
            "sections": [{"heading": h, "lines": list(ls)} for h, ls in self.sections],
            "cautions": list(self.cautions),
            "facts": dict(self.facts),
        }


def summarise(policy) -> PolicySummary:
    """Describe ``policy`` (an :class:`agent.policy.Policy`) in plain words.

    Parameters
    ----------
    policy : agent.policy.Policy
        A validated policy.

    Returns
    -------
    PolicySummary
    """
    s, r, e, pv, g = policy.schedule, policy.retention, policy.export, policy.privacy, policy.graph
    sections = []

    collected = [
        f"A {fmt_number(s.audio_snippet_seconds)}-second sound snippet every "
        f"{fmt_minutes(s.audio_interval_minutes)}.",
        f"A location fix every {fmt_minutes(s.gps_interval_minutes)}.",
        f"Movement readings at {fmt_number(s.accel_rate_hz)} per second, in bursts of "
        f"{fmt_seconds(s.accel_burst_seconds)} every {fmt_minutes(s.accel_interval_minutes)}.",
        f"A mood prompt {fmt_number(s.mood_prompts_per_day)} times a day, asking you to rate "
        f"{len(s.emotions)} emotions ({', '.join(s.emotions)}) on a scale from "
        f"{s.mood_scale_min} to {s.mood_scale_max}.",
        "From time to time, a short memory quiz: where were you at a given hour, "
        f"between {fmt_days(policy.quiz.min_age_days)} and {fmt_days(policy.quiz.max_age_days)} ago, "
        f"chosen from {policy.quiz.options} of your places.",
    ]
    sections.append(("What is collected", collected))

    kept_kinds = [KIND_SHORT[k] for k in g.nodes]
    kept = [
        f"Each original file (sound, location, movement, mood answers) is destroyed at most "
        f"{fmt_seconds(r.raw_seconds)} after it has finished arriving.",
        "Only measurements computed from it are kept for a while: for sound, a short "
        "numeric fingerprint and the loudness, never the recording; for movement, "
        "activity levels.",
        f"These measurements are discarded once they are turned into codes, and never kept "
        f"longer than {fmt_days(r.feature_days)}.",
        f"Location fixes are held at most {fmt_minutes(r.gps_buffer_minutes)}, only until they "
        "are grouped into the places where you stayed.",
        "What stays on your laptop until the study ends is coarse: one record per hour with "
        f"codes for {_join(kept_kinds)}. Your own names for places stay on your laptop and are "
        "never sent.",
        "Everything on your laptop is stored encrypted.",
    ]
    if r.quarantine:
        kept.append(f"A file that cannot be read is kept encrypted for at most "
                    f"{fmt_seconds(r.raw_seconds)}, then destroyed.")
    else:
        kept.append("A file that cannot be read is destroyed straight away; only the reason is noted.")
    sections.append(("What stays on your laptop, and for how long", kept))

    exported = policy.exported_kinds()
    withheld = [k for k in g.nodes if k not in exported]
    content = [f"counts of how often {_join([KIND_SHORT[k] for k in exported])} occurred together"]
    if e.include_edge_list:
        content.append("the list of those pairs")
    if e.include_model:
        content.append("the fitted settings of the memory model")
    if e.include_quiz_summary:
        content.append("a summary of your quiz scores")
    when = f"About every {fmt_days(e.cadence_days)}" if e.cadence_days > 0 else "Only when an export is started"
    leaves = [
        f"{when}, one sealed package that only the study's key can open, holding "
        f"{_join(content)}.",
        f"Dates in it are no finer than the {e.time_granularity}.",
    ]
    if withheld:
        leaves.append(f"Used on your laptop but never sent: {_join([KIND_SHORT[k] for k in withheld])}.")
    leaves.append("Never sent: sound recordings, coordinates, exact times, your place names, "
                  "the measurements behind the codes.")
    if e.confirm_each:
        leaves.append("You are asked to confirm before each package is sent.")
    else:
        leaves.append("Packages are prepared without asking you each time; you can pause or "
                      "withdraw at any time.")
    sections.append(("What leaves your laptop, and in what form", leaves))

    control = []
    if e.small_cell_threshold > 0:
        how = "left out" if e.small_cell_rule == "suppress" else "merged into a larger group"
        control.append(f"Any count smaller than {e.small_cell_threshold} is {how} before sending, "
                       "so rare combinations cannot single you out.")
    else:
        control.append("Small counts are not suppressed (the small-cell threshold is 0).")
    if pv.dp:
        unit = "one hour's record" if pv.unit == "episode" else "one whole day"
        control.append(
            f"Random noise is added to the counts (differential privacy). Each package uses at "
            f"most epsilon = {fmt_number(pv.epsilon_per_export)} of a total budget of "
            f"epsilon = {fmt_number(pv.epsilon_total)}; the noise hides the contribution of "
            f"{unit}. When the budget is used up, no more packages are sent.")
    else:
        control.append("No random noise is added (differential privacy is off); protection "
                       "rests on sealing, coarse codes and the small-count rule.")
    sections.append(("How disclosure is limited", control))

    who = [f"Study: {policy.study.study_id}."]
    if policy.study.contact:
        who.append(f"Contact: {policy.study.contact}.")
    sections.append(("Who runs it", who))

    facts = {
        "policy": {"name": policy.policy.name, "version": policy.policy.version},
        "study_id": policy.study.study_id,
        "raw_seconds": r.raw_seconds,
        "feature_days": r.feature_days,
        "gps_buffer_minutes": r.gps_buffer_minutes,
        "node_kinds": list(g.nodes),
        "exported_kinds": exported,
        "withheld_kinds": withheld,
        "time_granularity": e.time_granularity,
        "confirm_each": e.confirm_each,
        "small_cell_threshold": e.small_cell_threshold,
        "dp": pv.dp,
        "epsilon_per_export": pv.epsilon_per_export if pv.dp else None,
        "epsilon_total": pv.epsilon_total if pv.dp else None,
        "privacy_unit": pv.unit if pv.dp else None,
    }
    title = f"Study policy {policy.policy.name} (version {policy.policy.version})"
    return PolicySummary(title, policy.fingerprint, sections, list(CAUTIONS), facts)
