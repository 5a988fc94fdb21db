"""Issue 15, intake side: the retention rule beats featurising, chunked scans, reports aggregated as files go."""

from __future__ import annotations

import os
import time
from types import SimpleNamespace

import numpy as np
import pytest

from intake_samples import T0, make_home, stamp, wav_bytes


@pytest.fixture
def hp(tmp_path):
    h = make_home(tmp_path / "home")
    return h, h.load_policy()


def _events(h):
    from agent.ledger import Ledger

    return [(e["event"], e.get("reason")) for e in Ledger(h).entries()]


def test_file_too_close_to_its_deadline_is_destroyed_unparsed_with_a_reason(hp):
    """Judged 1 s before its deadline: not parsed nor kept, destroyed, the ledger says why."""
    from agent.intake.pipeline import Intake

    h, policy = hp
    p = h.inbox / f"snd_{stamp(T0)}.wav"
    p.write_bytes(wav_bytes())
    late = time.time() + policy.retention.raw_seconds - 1.0
    with Intake(h, policy) as it:
        outs = it.process_many([p.name], judged_at=late)
        kept = it.vault.count("audio_features")
    assert [(o.status, o.reason, o.kind) for o in outs] == [("rejected", "retention_deadline", "audio")]
    assert outs[0].removed and not p.exists()
    assert kept == 0
    assert _events(h) == [("received", None), ("rejected", "retention_deadline"), ("destroyed", None)]


def test_file_well_inside_its_window_is_featurised(hp):
    """The counterpart: judged at once, the same file is read and kept."""
    from agent.intake.pipeline import Intake

    h, policy = hp
    p = h.inbox / f"snd_{stamp(T0)}.wav"
    p.write_bytes(wav_bytes())
    with Intake(h, policy) as it:
        outs = it.process_many([p.name])
    assert [(o.status, o.reason) for o in outs] == [("featurised", None)]


def test_deadline_margin_stays_inside_a_short_window(tmp_path):
    """raw_seconds = 1 s: the margin is at most half the window, so fresh files are still featurised."""
    from agent.intake.pipeline import Intake

    h = make_home(tmp_path / "home", raw_seconds=1.0, settle_seconds=0.1)
    policy = h.load_policy()
    with Intake(h, policy) as it:
        assert 0 < it.deadline_margin_s <= policy.retention.raw_seconds / 2


def test_scan_with_a_limit_keeps_the_closest_deadlines_in_order(hp):
    from agent.intake.safety import InboxDir
    from agent.intake.scan import scan

    h, _ = hp
    now = time.time()
    for i in range(12):
        p = h.inbox / f"f{i:02d}.mood.csv"
        p.write_bytes(b"x")
        os.utime(p, (now - 100 + i, now - 100 + i))
    with InboxDir(h.inbox, 1 << 20) as inbox:
        full, _, _ = scan(inbox, now + 200, 0.0, 30.0)
        part, _, _ = scan(inbox, now + 200, 0.0, 30.0, limit=5)
    assert [c.name for c in part] == [c.name for c in full][:5]
    assert len(full) == 12


def test_scan_refuses_a_limit_below_one(hp):
    from agent.intake.safety import InboxDir
    from agent.intake.scan import scan

    h, _ = hp
    with InboxDir(h.inbox, 1 << 20) as inbox, pytest.raises(ValueError, match="limit must be a positive"):
        scan(inbox, time.time(), 0.0, 30.0, limit=0)


def _outcome(kind, status, exposure, reason=None):
    return SimpleNamespace(kind=kind, status=status, reason=reason, destroyed_at=1.0, rows=1 if status == "featurised"
                           else 0, n_samples=3, exposure_s=exposure,
                           error=f"x: rejected ({reason})" if status == "rejected" else None)


def test_report_builder_quantiles_match_numpy_type7():
    """Median and p95 of the aggregated exposures: numpy.percentile's default 'linear' method is
    Hyndman and Fan's type 7 (numpy documentation), the definition the ledger verifier uses."""
    from agent.intake.report import ReportBuilder

    rng = np.random.default_rng(1)
    xs = rng.uniform(0, 40, 501)
    acc = ReportBuilder(30.0)
    for i, x in enumerate(xs):
        acc.add(_outcome("audio" if i % 2 else "accel", "featurised", float(x)))
    rep = acc.report(seconds=1.0)
    assert rep.exposure["median_s"] == pytest.approx(np.percentile(xs, 50), abs=1e-4)
    assert rep.exposure["p95_s"] == pytest.approx(np.percentile(xs, 95), abs=1e-4)
    assert rep.over_limit == int((xs > 30.0).sum())
    assert rep.received == {"audio": 250, "accel": 251} and rep.rows == 501


def test_report_builder_names_a_bounded_number_of_rejected_files():
    from agent.intake.report import MAX_SHOWN_ERRORS, ReportBuilder

    acc = ReportBuilder(30.0)
    for _ in range(MAX_SHOWN_ERRORS + 7):
        acc.add(_outcome("gps", "rejected", 0.5, reason="bad_gpx"))
    rep = acc.report()
    assert rep.reasons == {"bad_gpx": MAX_SHOWN_ERRORS + 7}
    assert len(rep.errors) == MAX_SHOWN_ERRORS + 1 and rep.errors[-1].startswith("... and 7 more")


def test_report_builder_agrees_with_the_report_of_a_list(hp):
    """A drain's report (aggregated as files go) equals the one built from its outcomes afterwards."""
    from agent.intake.pipeline import Intake
    from agent.intake.report import DrainReport, ReportBuilder

    h, policy = hp
    for i in range(3):
        (h.inbox / f"snd_{stamp(T0 + 60 * i)}.wav").write_bytes(wav_bytes(seed=i))
    (h.inbox / "notes.txt").write_bytes(b"hello")
    with Intake(h, policy) as it:
        outs = it.process_many(sorted(os.listdir(h.inbox)))
    a = ReportBuilder(policy.retention.raw_seconds).extend(outs).report()
    b = DrainReport.from_outcomes(outs, policy.retention.raw_seconds)
    assert a.as_dict() == b.as_dict()
    assert a.featurised == {"audio": 3} and a.reasons == {"unknown_format": 1}


@pytest.mark.parametrize(("recent_latency_s", "expected"), [(0.0, ("featurised", None)),
                                                             (5.0, ("rejected", "retention_deadline"))])
def test_margin_grows_with_the_recent_time_from_taking_to_destroying(hp, recent_latency_s, expected):
    """8 s before its deadline: read when groups have been quick, destroyed unread when the last groups took
    5 s from being taken to being destroyed (the margin is twice that, capped at raw_seconds / 2)."""
    from agent.intake.pipeline import Intake

    h, policy = hp
    p = h.inbox / f"snd_{stamp(T0)}.wav"
    p.write_bytes(wav_bytes())
    with Intake(h, policy) as it:
        it.recent_latency_s = recent_latency_s
        outs = it.process_many([p.name], judged_at=time.time() + policy.retention.raw_seconds - 8.0)
    assert [(o.status, o.reason) for o in outs] == [expected]


@pytest.mark.parametrize(("queued_after", "expected"), [(0, ("featurised", None)),
                                                        (10_000, ("rejected", "retention_deadline"))])
def test_long_queue_behind_a_file_stops_featurising_in_time(hp, queued_after, expected):
    """Taken at once, but 10,000 files queued behind it at 10 ms each would reach the deadline: destroyed
    unparsed so that the queue can be destroyed in time; with nothing queued it is featurised."""
    from agent.intake.pipeline import Intake

    h, policy = hp
    p = h.inbox / f"snd_{stamp(T0)}.wav"
    p.write_bytes(wav_bytes())
    with Intake(h, policy) as it:
        it.queued_after, it.per_file_s = queued_after, 0.010
        outs = it.process_many([p.name])
    assert [(o.status, o.reason) for o in outs] == [expected]


def test_drain_tells_intake_how_many_files_are_queued_behind_each_group(hp):
    from agent.intake.drain import adaptive_batches
    from agent.intake.pipeline import Intake

    h, policy = hp
    for i in range(10):
        (h.inbox / f"m{i}.mood.csv").write_bytes(b"x")
    with Intake(h, policy) as it:
        ready, _, _ = it.scan(settle_s=0.0, limit=4)
        assert it.ready_total == 10 and len(ready) == 4
        it.group_files = 3
        seen = [(names, it.queued_after) for names in adaptive_batches(ready, it)]
    assert [(len(n), q) for n, q in seen] == [(3, 7), (1, 6)]
    assert it.queued_after == 0
