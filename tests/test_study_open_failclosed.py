"""The researcher's opener fails closed and keeps going (issue 12, "Researcher side"; issue 13 item 5).

Each bad bundle is its own test: refused with a message naming the file and the
reason, nothing stored, the rest of the batch opened, and the exit code the
one docs/cli.md lists for that kind of fault.
"""

from __future__ import annotations

import json
import os
import struct

import pytest

from agent.bundle import MAGIC, MAX_BUNDLE_BYTES, bundle_name, make_header
from agent.errors import EXIT_DATA, EXIT_STATE, DataError
from agent.canonical import dumps as canonical_json
from agent.study.bounded import MAX_SAFE_INT, loads_bounded, nesting_depth
from agent.study.card import device_key_id
from agent.hpke_suites import suite_of
from agent.study.open import bundle_paths, open_bundles
from agent.study.registry import Registry

from _bundle_fixtures import PASS, Study, make_payload


@pytest.fixture
def study(tmp_path):
    return Study(tmp_path)


def seal_raw(study, plaintext: bytes, seq=1, header_bytes=None):
    """A correctly framed, sealed and signed bundle around arbitrary payload bytes."""
    dev = study.device
    header = make_header(suite=study.card.suite, study_id=study.card.study_id,
                         recipient=study.card.key_fingerprint,
                         device_key_id=device_key_id(dev.public_key().public_bytes_raw()), seq=seq,
                         created=make_payload(study.policy)["created"])
    hb = header_bytes if header_bytes is not None else canonical_json(header)
    sealed = suite_of(study.card.suite).encrypt(plaintext, study.card.hpke_public_key(), info=hb)
    enc, ct = sealed[:32], sealed[32:]
    body = b"".join([MAGIC, struct.pack(">HI", 1, len(hb)), hb, struct.pack(">H", len(enc)), enc,
                     struct.pack(">I", len(ct)), ct])
    return body + dev.sign(body)


def batch(study, bad: bytes):
    """Open [good #1, bad, good #2] without strictness; the bad one fails, both good ones open."""
    paths = [study.write(study.seal(seq=1), "a.lethe"), study.write(bad, "b.lethe"),
             study.write(study.seal(seq=2), "c.lethe")]
    res = open_bundles(study.dir, paths, PASS, strict=False)
    assert [r.ok for r in res] == [True, False, True], [r.error for r in res]
    assert not (study.dir / "received" / study.pseudonym / "3.json").exists()
    assert Registry.load(study.dir).device(study.pseudonym).seen.keys() == {"1", "2"}
    assert str(paths[1]) in res[1].error
    return res[1]


def test_payload_nested_40000_deep(study):
    r = batch(study, seal_raw(study, b"[" * 40000 + b"]" * 40000, seq=3))
    assert "nested too deeply" in r.error and r.exit_code == EXIT_DATA


def test_payload_nested_past_the_limit(study):
    # 40 levels parse without recursion trouble but are past the schema's depth bound.
    r = batch(study, seal_raw(study, b'{"a":' * 40 + b"1" + b"}" * 40, seq=3))
    assert "nested 40 levels deep" in r.error and r.exit_code == EXIT_DATA


def test_header_nested_deep(study):
    # A header of 30,000 brackets: damaged, so it reads as a signature failure for no enrolled key,
    # never as a traceback.
    r = batch(study, seal_raw(study, b"{}", seq=3, header_bytes=b"[" * 30000 + b"]" * 30000))
    assert r.exit_code in (EXIT_DATA, 4)


def test_huge_integer_count(study):
    # counts.hours = 10**4000 (the finding); I-JSON's range ends at 2**53 - 1 (RFC 7493 section 2.2).
    p = make_payload(study.policy)
    text = json.dumps(p).replace(f'"hours": {p["counts"]["hours"]}', '"hours": 1' + "0" * 4000, 1)
    assert "0" * 4000 in text
    r = batch(study, seal_raw(study, text.encode(), seq=3))
    assert "out of range" in r.error and r.exit_code == EXIT_DATA


def test_float_overflow_to_infinity(study):
    p = make_payload(study.policy)
    text = json.dumps(p).replace('"beta": 2.0', '"beta": 1e400', 1)
    assert "1e400" in text
    r = batch(study, seal_raw(study, text.encode(), seq=3))
    assert "out of range" in r.error


def test_nan_constant(study):
    p = make_payload(study.policy)
    text = json.dumps(p).replace('"beta": 2.0', '"beta": NaN', 1)
    r = batch(study, seal_raw(study, text.encode(), seq=3))
    assert "not a JSON number" in r.error


def test_oversized_file_is_not_read(study):
    # A sparse file one byte past the largest bundle: refused from its size alone.
    big = study.tmp / "huge.lethe"
    with open(big, "wb") as f:
        f.truncate(MAX_BUNDLE_BYTES + 1)
    paths = [study.write(study.seal(seq=1), "a.lethe"), big]
    res = open_bundles(study.dir, paths, PASS, strict=False)
    assert [r.ok for r in res] == [True, False]
    assert "larger than any bundle can be" in res[1].error and res[1].exit_code == EXIT_DATA


def test_oversized_file_strict_raises_data_error(study):
    big = study.tmp / "huge.lethe"
    with open(big, "wb") as f:
        f.truncate(3 * 1024**3)  # the finding's 3 GB, sparse
    with pytest.raises(DataError, match="larger than any bundle"):
        open_bundles(study.dir, [big], PASS)


def test_not_a_regular_file(study):
    fifo = study.tmp / "pipe.lethe"
    os.mkfifo(fifo)
    res = open_bundles(study.dir, [fifo], PASS, strict=False)
    assert not res[0].ok and "not a regular file" in res[0].error


def test_missing_file_keeps_going(study):
    res = open_bundles(study.dir, [study.tmp / "nope.lethe", study.write(study.seal(seq=1))], PASS, strict=False)
    assert [r.ok for r in res] == [False, True] and "no such bundle file" in res[0].error


def test_replay_after_unsaved_registry(study):
    # A stored record that the registry does not list yet (a crash between the two) still refuses
    # a different bundle under the same number.
    open_bundles(study.dir, [study.write(study.seal(seq=1), "a.lethe")], PASS)
    reg = Registry.load(study.dir)
    reg.devices[study.pseudonym].seen.clear()
    reg.save()
    other = study.seal(make_payload(study.policy), seq=1)
    res = open_bundles(study.dir, [study.write(other, "b.lethe")], PASS, strict=False)
    assert not res[0].ok and "replayed sequence number" in res[0].error and res[0].exit_code == EXIT_STATE


def test_open_a_folder(study):
    folder = study.tmp / "inbox"
    (folder / "sub").mkdir(parents=True)
    (folder / "x-000001.lethe").write_bytes(study.seal(seq=1))
    (folder / "sub" / "x-000002.lethe").write_bytes(study.seal(seq=2))
    (folder / "notes.txt").write_text("not a bundle")
    assert [p.name for p in bundle_paths([folder])] == ["x-000001.lethe", "x-000002.lethe"]
    res = open_bundles(study.dir, [folder], PASS)
    assert [r.seq for r in res] == [1, 2]


def test_registry_written_once_per_call(study, monkeypatch):
    calls = []
    orig = Registry.save
    monkeypatch.setattr(Registry, "save", lambda self: (calls.append(1), orig(self)))
    paths = [study.write(study.seal(seq=i), f"{i}.lethe") for i in range(1, 6)]
    assert all(r.ok for r in open_bundles(study.dir, paths, PASS))
    assert len(calls) == 1


def test_bundle_names_carry_pseudonym_and_sequence():
    assert bundle_name(7, "pX7QmN2a") == "pX7QmN2a-000007.lethe"
    assert bundle_name(7) == "bundle-000007.lethe"
    assert bundle_name(7, "../evil") == "bundle-000007.lethe"  # not a pseudonym: never a path


# -- the bounded JSON reader on its own ---------------------------------------------
def test_bounded_accepts_the_safe_integer_limit():
    # RFC 7493 section 2.2: integers in [-(2**53)+1, 2**53-1] interoperate.
    assert loads_bounded(str(MAX_SAFE_INT), "t") == 2**53 - 1
    assert loads_bounded(str(-MAX_SAFE_INT), "t") == -(2**53) + 1


def test_bounded_refuses_one_past_the_limit():
    with pytest.raises(DataError, match="out of range"):
        loads_bounded(str(2**53), "t")


def test_nesting_depth_counts_containers():
    assert nesting_depth(1) == 0 and nesting_depth([]) == 1 and nesting_depth({"a": [[1]]}) == 3
