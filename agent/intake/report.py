"""Drain reports (aggregated as files go) and the ledger-derived counts ``lethe status`` shows."""

from __future__ import annotations

from typing import Any

import time
from array import array
from collections import Counter, defaultdict
from dataclasses import dataclass, field

from ..errors import LetheError
from ..home import Home
from ..stats import exposure_summary
from .ledgerlog import read_alarm


def exposure_stats(values) -> dict:
    """``{"n", "median_s", "p95_s", "max_s"}`` rounded to 0.1 ms; empty: None.

    The same statistics as the ledger verifier's (:func:`agent.stats.exposure_summary`,
    Hyndman and Fan type 7), so ``lethe status`` and ``lethe audit verify`` agree.
    """
    st = exposure_summary(values)
    return {k: (round(v, 4) if isinstance(v, float) else v) for k, v in st.items()}


@dataclass
class DrainReport:
    """Counts of one drain by kind, rejections by reason, exposure statistics.

    ``errors`` and ``skipped`` name files: show them to the participant, never persist them.
    """

    received: dict = field(default_factory=dict)
    featurised: dict = field(default_factory=dict)
    duplicate: dict = field(default_factory=dict)
    rejected: dict = field(default_factory=dict)
    destroyed: dict = field(default_factory=dict)
    reasons: dict = field(default_factory=dict)
    rows: int = 0
    n_samples: dict = field(default_factory=dict)
    exposure: dict = field(default_factory=dict)
    over_limit: int = 0
    recovered: int = 0
    errors: list = field(default_factory=list)
    skipped: list = field(default_factory=list)
    seconds: float = 0.0
    raw_seconds: float = 0.0

    @classmethod
    def from_outcomes(cls, outcomes, raw_seconds: float, **kw) -> DrainReport:
        """The report of a finished list of outcomes (see :class:`ReportBuilder` to aggregate as files go)."""
        acc = outcomes if isinstance(outcomes, ReportBuilder) else ReportBuilder(raw_seconds).extend(outcomes)
        return acc.report(**kw)

    def redacted(self) -> DrainReport:
        """A copy without file names (for the service's log): rejections and skips as counts only."""
        from dataclasses import replace

        errors = [f"{len(self.errors)} file(s) rejected (names are shown only when run by hand)"] if self.errors else []
        skipped = [f"{len(self.skipped)} entr(y/ies) skipped (names are shown only when run by hand)"] \
            if self.skipped else []
        return replace(self, errors=errors, skipped=skipped)

    def total(self, which: str) -> int:
        return sum(getattr(self, which).values())

    def as_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}

    def text(self) -> str:
        def by_kind(d):
            return ", ".join(f"{k} {d[k]}" for k in sorted(d)) or "none"

        e = self.exposure
        lines = [
            f"received {self.total('received')} ({by_kind(self.received)})",
            f"featurised {self.total('featurised')} ({by_kind(self.featurised)}), "
            f"{self.total('duplicate')} already kept, {self.rows} feature rows written",
            f"rejected {self.total('rejected')} ({by_kind(self.reasons)})",
            f"destroyed {self.total('destroyed')} ({by_kind(self.destroyed)})",
        ]
        if e.get("n"):
            lines.append(f"raw exposure: median {e['median_s']:.3f} s, p95 {e['p95_s']:.3f} s, "
                         f"max {e['max_s']:.3f} s (limit {self.raw_seconds:g} s; "
                         f"{self.over_limit} over the limit)")
        if self.recovered:
            lines.append(f"closed {self.recovered} item(s) left open by an interrupted run")
        for s in self.skipped:
            lines.append(f"skipped: {s}")
        for err in self.errors:
            lines.append(err)
        lines.append(f"took {self.seconds:.2f} s")
        return "\n".join(lines)


MAX_SHOWN_ERRORS = 200   # rejected files named in one report; the rest are counted


class ReportBuilder:
    """A drain report aggregated as files go: counts by kind and reason, exposures as 8-byte floats.

    Nothing per file is kept but its exposure (for the exact median and p95,
    type 7 like the ledger verifier) and, for at most :data:`MAX_SHOWN_ERRORS`
    rejected files, the line that names it (shown, never persisted), so a
    drain's memory does not grow with the backlog by the outcomes it held.

    Parameters
    ----------
    raw_seconds : float
        ``retention.raw_seconds``: exposures above it are counted ``over_limit``.
    """

    def __init__(self, raw_seconds: float):
        self.raw_seconds = float(raw_seconds)
        self.counts: dict[str, Counter] = {k: Counter() for k in
                                           ("received", "featurised", "duplicate", "rejected", "destroyed")}
        self.reasons: Counter = Counter()
        self.samples: Counter = Counter()
        self.rows = 0
        self.n = 0
        self.exposures = array("d")
        self.over_limit = 0
        self.errors: list[str] = []
        self.more_errors = 0

    def add(self, o) -> None:
        """Count one :class:`~agent.intake.pipeline.Outcome`."""
        self.n += 1
        self.counts["received"][o.kind] += 1
        self.counts[o.status][o.kind] += 1
        if o.status == "rejected":
            self.reasons[o.reason] += 1
        if o.destroyed_at is not None:
            self.counts["destroyed"][o.kind] += 1
        self.rows += o.rows
        self.samples[o.kind] += o.n_samples
        if o.exposure_s is not None:
            self.exposures.append(float(o.exposure_s))
            if o.exposure_s > self.raw_seconds:
                self.over_limit += 1
        err = o.error
        if err:
            if len(self.errors) < MAX_SHOWN_ERRORS:
                self.errors.append(err)
            else:
                self.more_errors += 1

    def extend(self, outcomes) -> ReportBuilder:
        for o in outcomes:
            self.add(o)
        return self

    def __len__(self) -> int:
        return self.n

    def report(self, **kw) -> DrainReport:
        c = self.counts
        errors = list(self.errors)
        if self.more_errors:
            errors.append(f"... and {self.more_errors} more rejected file(s)")
        return DrainReport(received=dict(c["received"]), featurised=dict(c["featurised"]),
                           duplicate=dict(c["duplicate"]), rejected=dict(c["rejected"]),
                           destroyed=dict(c["destroyed"]), reasons=dict(self.reasons), rows=self.rows,
                           n_samples=dict(self.samples), exposure=exposure_stats(self.exposures),
                           over_limit=self.over_limit, errors=errors, raw_seconds=self.raw_seconds, **kw)


def intake_counts(home, policy=None, now: float | None = None) -> dict:
    """Ledger-derived counts for ``lethe status``, plus the inbox's current raw files.

    Returns
    -------
    dict
        ``{"received": {kind: n}, "featurised": {...}, "rejected": {...},
        "destroyed": {...}, "reasons": {reason: n}, "exposure": {...},
        "inbox": {"files": n, "oldest_age_s": float | None, "limit_s": float,
        "in_subfolders": n, "unfinished": n}, "alarm": dict | None}``.
        ``files`` counts every entry that is not a folder, in subfolders too
        (walked without following links), ``.part`` and hidden files included.
        Reads the ledger without a signing key and lists the inbox without
        opening any file.
    """
    from ..ledger import Ledger

    h = home if isinstance(home, Home) else Home(home)
    counts: dict[str, defaultdict] = {k: defaultdict(int) for k in ("received", "featurised", "rejected", "destroyed")}
    reasons: Counter = Counter()
    exp = []
    if h.ledger_path.exists():
        # The ledger's running state: its last signed checkpoint plus the entries after it.
        state = Ledger(h, signing_key=None).state()
        for kind, per in state.kinds.items():
            for ev, n in per.items():
                if n:
                    counts[ev][kind] += n
        reasons.update(state.reasons)
        exp = state.exposures()  # millisecond resolution
    now = time.time() if now is None else float(now)
    files, subdirs, unfinished, oldest = 0, 0, 0, None
    try:
        from .safety import InboxDir
        from .scan import unfinished_reason, walk

        with InboxDir(h.inbox, 1) as inbox:
            for name, st in walk(inbox):
                if "/" in name:
                    subdirs += 1
                if unfinished_reason(name):
                    unfinished += 1   # .part, hidden, or a destruction to finish: raw data all the same
                files += 1
                age = now - max(st.st_mtime, st.st_ctime)
                oldest = age if oldest is None else max(oldest, age)
    except (OSError, LetheError):
        pass
    if policy is None:
        try:
            policy = h.load_policy()
        except LetheError:
            policy = None
    limit = float(policy.retention.raw_seconds) if policy is not None else None
    out: dict[str, Any] = {k: dict(v) for k, v in counts.items()}
    out.update(reasons=dict(reasons), exposure=exposure_stats(exp),
               inbox={"files": files, "oldest_age_s": None if oldest is None else round(max(oldest, 0.0), 3),
                      "limit_s": limit, "in_subfolders": subdirs, "unfinished": unfinished},
               alarm=read_alarm(h))
    return out
