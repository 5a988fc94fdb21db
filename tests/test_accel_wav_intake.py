"""A binary accelerometry burst (*.accel.wav) through the whole intake: kept, destroyed, ledgered."""

from __future__ import annotations

import io

import numpy as np

from intake_samples import T0, drop, our_files, stamp


def _wav_burst(n=600, rate=10):
    import soundfile as sf

    rng = np.random.default_rng(5)
    xyz = rng.normal(0.0, 0.05, (n, 3))
    xyz[:, 2] += 1.0
    buf = io.BytesIO()
    sf.write(buf, xyz.astype(np.float32), rate, format="WAV", subtype="FLOAT")
    return buf.getvalue()


def test_wav_burst_is_featurised_destroyed_and_ledgered(h):
    from agent.intake.pipeline import drain
    from agent.ledger import verify_ledger
    from agent.vault import Vault

    policy = h.load_policy()
    drop(h.inbox, f"burst_{stamp(T0)}.accel.wav", _wav_burst())
    rep = drain(h, policy, settle_s=0.0)
    assert our_files(h.inbox) == []
    assert rep.total("featurised") == 1 and rep.total("destroyed") == 1
    with Vault.open(h) as v:
        (_, row), = list(v.items("accel_features"))
    assert row["t0"] == T0 and len(row["windows"]) == 6
    report = verify_ledger(h)
    assert report.ok, report.problems + report.violations


def test_wav_burst_of_pcm_is_rejected_and_destroyed(h):
    import soundfile as sf

    from agent.intake.pipeline import drain

    buf = io.BytesIO()
    sf.write(buf, np.zeros((600, 3), dtype=np.float32) + 0.5, 10, format="WAV", subtype="PCM_16")
    drop(h.inbox, f"burst_{stamp(T0)}.accel.wav", buf.getvalue())
    rep = drain(h, h.load_policy(), settle_s=0.0)
    assert our_files(h.inbox) == []
    assert rep.total("rejected") == 1
