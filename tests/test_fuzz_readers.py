"""Every reader under hypothesis: random, damaged and field-edited inputs only ever give features or a
RejectedInput with a reason code (never another exception), in-process and in the agent's forked child.

tests/test_bad_inputs.py fuzzes seven formats with random bytes; this adds FLAC, Ogg Vorbis, the binary
accelerometry burst and the JSON mood file, structure-aware damage (cuts, flips, runs of a byte, hostile
field values) and the forked-child path.  A longer run: ``python tests/fuzz/fuzz_readers.py`` (figures in
docs/intake.md).
"""

from __future__ import annotations

import os

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fuzz_samples import NAMES, apply_damage, damage, edit_field, field_edit, outcome, valid_samples

FUZZ = settings(max_examples=int(os.environ.get("LETHE_FUZZ_EXAMPLES", "25")), deadline=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture])
TEXT = [n for n in NAMES if n.endswith((".csv", ".gpx", ".nmea", ".json"))]


@pytest.fixture(scope="module")
def samples():
    from agent.policy import load_policy
    from intake_samples import REPO

    policy = load_policy(REPO / "policies" / "default.toml")
    return policy, valid_samples(policy)


@pytest.mark.parametrize("name", NAMES)
def test_every_sample_is_valid(samples, name):
    """The fuzzing starts from files the reader accepts (else it would only test rejection)."""
    from agent.intake import featurise
    from agent.intake.item import ItemResult

    policy, s = samples
    got = outcome(featurise, name, s[name], policy)
    assert isinstance(got, ItemResult), got


@pytest.mark.parametrize("name", NAMES)
@FUZZ
@given(d=damage)
def test_damaged_files_give_features_or_a_reason(samples, name, d):
    from agent.errors import RejectedInput
    from agent.intake import featurise
    from agent.intake.item import ItemResult

    policy, s = samples
    assert isinstance(outcome(featurise, name, apply_damage(s[name], d), policy), (ItemResult, RejectedInput))


@pytest.mark.parametrize("name", TEXT)
@FUZZ
@given(edits=st.lists(field_edit, min_size=1, max_size=4))
def test_hostile_field_values_give_features_or_a_reason(samples, name, edits):
    from agent.errors import RejectedInput
    from agent.intake import featurise
    from agent.intake.item import ItemResult

    policy, s = samples
    data = s[name]
    for e in edits:
        data = edit_field(data, e)
    assert isinstance(outcome(featurise, name, data, policy), (ItemResult, RejectedInput))


@settings(max_examples=5, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(d=damage)
def test_forked_child_answers_for_every_reader(samples, d):
    """The agent's path: one forked child per group answers for every damaged file, none dies."""
    from agent.errors import RejectedInput
    from agent.intake.item import ItemResult
    from agent.intake.worker import featurise_forked

    policy, s = samples
    from fuzz_samples import NOW

    jobs = [(n, apply_damage(s[n], d)) for n in NAMES]
    got = featurise_forked(jobs, policy, NOW, 60.0)
    assert len(got) == len(jobs)
    assert all(isinstance(g, (ItemResult, RejectedInput)) for g in got), got
