"""The drain loop: everything in the inbox, oldest deadline first, in small groups bounded in files and time."""

from __future__ import annotations

import logging
import time

from .pipeline import Intake
from .report import DrainReport, ReportBuilder

log = logging.getLogger("lethe.intake")


def drain(home, policy, now: float | None = None, *, settle_s: float | None = None,
          intake: Intake | None = None, on_outcome=None) -> DrainReport:
    """Process everything in the inbox, oldest deadline first, until it holds none of our files.

    Files still being written (modified within ``settle_s``) are waited for;
    files that arrive during the drain are taken too; subfolders are walked
    (never through a link).  Unfinished names (``.part``, hidden) still inside
    the retention window are left for a later run or the watching agent;
    older ones are destroyed unread.  Destructions a killed run had begun are
    finished first.  Groups start at one file after a start and double while
    a group takes less than :data:`GROUP_SECONDS`, so every life of the agent,
    however short, commits something.  Does not take the home lock:
    :func:`~agent.intake.watcher.run_agent` and ``lethe run`` do.

    Parameters
    ----------
    home : Home or path-like
    policy : agent.policy.Policy
    now : float, optional
        Simulated clock passed to the readers (see :class:`Intake`).
    settle_s : float, optional
        Overrides ``policy.retention.settle_seconds``.
    """
    t0 = time.time()
    own = intake is None
    if intake is None:
        intake = Intake(home, policy, now=now)
    acc = ReportBuilder(float(policy.retention.raw_seconds))
    skipped: dict = {}
    stuck = 0

    def take(o) -> None:
        acc.add(o)
        if on_outcome is not None:
            on_outcome(o)

    try:
        intake.finish_leftovers()
        while True:
            # The SCAN_CHUNK closest deadlines only: the next pass rescans (files that arrived meanwhile
            # take their place by deadline), so memory does not grow with the size of the backlog.
            ready, settling, _waiting = intake.scan(settle_s=settle_s, limit=SCAN_CHUNK)
            got = intake.process_groups(adaptive_batches(ready, intake), on_outcome=take)
            if not ready and not settling:
                break
            stuck = stuck + 1 if ready and not got else 0
            if stuck >= STUCK_PASSES:
                # Something keeps failing (entries that cannot be removed): report instead of spinning.
                for c in ready:
                    skipped[c.name] = (f"{intake.inbox.display(c.name)}: could not be processed in "
                                       f"{STUCK_PASSES} passes; see the agent log")
                break
            if stuck:
                time.sleep(min(5.0, 0.1 * 2 ** stuck))
            if not ready:
                wait = min(max(0.0, float(settle_s if settle_s is not None else
                                          policy.retention.settle_seconds)), 1.0)
                time.sleep(max(wait / 4, 0.01))  # waiting for a writer to finish: short and bounded
        recovered = intake.reconcile(t0)
        if not intake.log.flush(force=True):
            skipped["~ledger"] = (f"ledger: {len(intake.log.pending)} entries could not be written yet "
                                  f"(integrity alarm; see 'lethe status'); the files were destroyed all the same")
    finally:
        if own:
            intake.close()
    return acc.report(skipped=sorted(skipped.values()), recovered=recovered, seconds=round(time.time() - t0, 3))


SCAN_CHUNK = 4096           # ready entries taken from one scan of the inbox (closest deadlines first)
BATCH_FILES = 64            # files taken together in a backfill, at most
GROUP_SECONDS = 1.0         # a group that takes longer halves the next one; a quicker one doubles it
STUCK_PASSES = 3            # drain passes without progress before it gives up and reports
BATCH_BYTES = 32 << 20      # and at most this many raw bytes in memory at once


def batches(candidates, max_file_bytes: int, max_files: int = BATCH_FILES, max_bytes: int = BATCH_BYTES):
    """Split deadline-ordered candidates into groups for :meth:`Intake.process_many`."""
    group: list = []
    size = 0
    for c in candidates:
        n = min(int(c.lst.st_size), int(max_file_bytes))
        if group and (len(group) >= max_files or size + n > max_bytes):
            yield group
            group, size = [], 0
        group.append(c)
        size += n
    if group:
        yield group


def adaptive_batches(candidates, intake: Intake, max_bytes: int = BATCH_BYTES):
    """Like :func:`batches`, the group size read from ``intake.group_files`` as each group is cut.

    Before each group is handed on, ``intake.queued_after`` is set to how many
    ready files are still queued behind it (all of the last scan's ready files,
    not only this chunk), for the deadline rule of :class:`Intake`.
    """
    group: list = []
    size = 0
    total = max(int(getattr(intake, "ready_total", 0) or 0), len(candidates))
    taken = 0
    for c in candidates:
        n = min(int(c.lst.st_size), int(intake.inbox.max_file_bytes))
        alone = intake.is_suspect(c.name)   # a file a dead agent was parsing goes in a group of its own
        if group and (alone or len(group) >= intake.group_files or size + n > max_bytes):
            taken += len(group)
            intake.queued_after = total - taken
            yield [x.name for x in group]
            group, size = [], 0
        group.append(c)
        size += n
    if group:
        taken += len(group)
        intake.queued_after = total - taken
        yield [x.name for x in group]
    intake.queued_after = 0


def process_safely(intake: Intake, names, outcomes) -> list:
    """:meth:`Intake.process_many`; a group that fails is retried file by file, a failing file logged."""
    try:
        outs = intake.process_many(names)
    except (OSError, ValueError) as e:
        if len(names) > 1:  # find the one that fails; the others go through
            outs = []
            for n in names:
                outs += process_safely(intake, [n], [])
        else:
            # The agent keeps running; the name is shown on the terminal, not logged.
            log.error("intake_error name#=%s error=%s", intake.name_tag(names[0]), type(e).__name__)
            outs = []
    outcomes.extend(outs)
    return outs


