"""agent/destroy.py, the one safe way to destroy: one test per rule of the contract (docs/intake.md)."""

from __future__ import annotations

import os
import socket

import pytest

from agent.destroy import destroy_entry, destroy_path, destroy_tree, open_dir, overwrite_fd

from link_swaps import LinkSwaps, real_dir, real_file, snapshot

MiB = 1 << 20


@pytest.fixture
def outside(tmp_path):
    """A folder outside the tree being destroyed, with files whose bytes must survive."""
    d = tmp_path / "outside"
    d.mkdir()
    for i in range(3):
        (d / f"keep{i}.wav").write_bytes(bytes([65 + i]) * 5000)
    return d


def _snap(d):
    return {p.name: p.read_bytes() for p in sorted(d.iterdir())}


def _tree(tmp_path):
    t = tmp_path / "tree"
    (t / "sub" / "deeper").mkdir(parents=True)
    (t / "a.wav").write_bytes(b"x" * 10_000)
    (t / "sub" / "b.gps.csv").write_bytes(b"y" * 3_000)
    (t / "sub" / "deeper" / "c.mood.csv").write_bytes(b"z" * 100)
    return t


def test_tree_is_emptied_and_dirs_removed(tmp_path):
    t = _tree(tmp_path)
    fd = open_dir(t)
    try:
        rep = destroy_tree(fd, max_bytes=MiB)
    finally:
        os.close(fd)
    assert os.listdir(t) == []
    assert (rep.files, rep.dirs, rep.left) == (3, 2, 0)
    assert rep.overwritten_bytes == 13_100


def test_keep_names_survive(tmp_path):
    t = _tree(tmp_path)
    (t / "certificate.json").write_bytes(b"{}")
    fd = open_dir(t)
    try:
        rep = destroy_tree(fd, max_bytes=MiB, keep={"certificate.json"})
    finally:
        os.close(fd)
    assert os.listdir(t) == ["certificate.json"] and rep.kept == 1


def test_symlinked_subfolder_is_unlinked_not_followed(tmp_path, outside):
    t = _tree(tmp_path)
    os.symlink(outside, t / "photos")
    before = _snap(outside)
    fd = open_dir(t)
    try:
        destroy_tree(fd, max_bytes=MiB)
    finally:
        os.close(fd)
    assert os.listdir(t) == []
    assert _snap(outside) == before


def test_subfolder_swapped_for_link_after_listing_is_not_followed(tmp_path, outside, monkeypatch):
    """The window of finding 1: a folder listed as a folder, then replaced by a link before the descent."""
    t = _tree(tmp_path)
    before = _snap(outside)
    real_listdir = os.listdir
    swapped = []

    def listdir(p="."):
        names = real_listdir(p)
        if not swapped and "sub" in names:
            os.rename(t / "sub", tmp_path / "moved-away")
            os.symlink(outside, t / "sub")
            swapped.append(1)
        return names

    monkeypatch.setattr(os, "listdir", listdir)
    fd = open_dir(t)
    try:
        destroy_tree(fd, max_bytes=MiB)
    finally:
        os.close(fd)
    assert swapped and _snap(outside) == before
    assert not os.path.lexists(t / "sub")   # the link itself is gone


def test_open_dir_refuses_a_link(tmp_path, outside):
    os.symlink(outside, tmp_path / "link")
    with pytest.raises(OSError):
        open_dir(tmp_path / "link")


def test_symlink_to_file_target_untouched(tmp_path, outside):
    os.symlink(outside / "keep0.wav", tmp_path / "x.wav")
    before = _snap(outside)
    d = destroy_path(tmp_path / "x.wav", max_bytes=MiB)
    assert d.unlinked and d.kind == "symlink" and d.overwritten_bytes == 0
    assert _snap(outside) == before


def test_hardlink_other_name_keeps_its_bytes(tmp_path, outside):
    os.link(outside / "keep1.wav", tmp_path / "x.wav")
    before = _snap(outside)
    d = destroy_path(tmp_path / "x.wav", max_bytes=MiB)
    assert d.unlinked and d.skipped == "hardlink"
    assert _snap(outside) == before and not (tmp_path / "x.wav").exists()


def test_fifo_is_unlinked_never_opened(tmp_path):
    os.mkfifo(tmp_path / "p.wav")
    d = destroy_path(tmp_path / "p.wav", max_bytes=MiB)   # opening a FIFO would block: this returns
    assert d.unlinked and d.kind == "fifo" and not os.path.lexists(tmp_path / "p.wav")


def test_socket_is_unlinked(tmp_path):
    s = socket.socket(socket.AF_UNIX)
    try:
        s.bind(str(tmp_path / "s.wav"))
        d = destroy_path(tmp_path / "s.wav", max_bytes=MiB)
    finally:
        s.close()
    assert d.unlinked and d.kind == "socket"


def test_hardlink_whose_ctime_changes_midway_is_still_removed(tmp_path, outside):
    """Low finding: an entry whose ctime changed between lstat and unlink was recorded destroyed but stayed."""
    os.link(outside / "keep2.wav", tmp_path / "x.wav")
    lst = os.lstat(tmp_path / "x.wav")
    os.chmod(outside / "keep2.wav", 0o640)   # changes the shared inode's ctime
    fd = open_dir(tmp_path)
    try:
        d = destroy_entry(fd, "x.wav", max_bytes=MiB, expect=lst)
    finally:
        os.close(fd)
    assert d.gone and d.unlinked and not (tmp_path / "x.wav").exists()


def test_fifo_whose_ctime_changes_midway_is_still_removed(tmp_path):
    os.mkfifo(tmp_path / "p.wav")
    lst = os.lstat(tmp_path / "p.wav")
    os.chmod(tmp_path / "p.wav", 0o600)
    fd = open_dir(tmp_path)
    try:
        d = destroy_entry(fd, "p.wav", max_bytes=MiB, expect=lst)
    finally:
        os.close(fd)
    assert d.gone and not os.path.lexists(tmp_path / "p.wav")


def test_entry_replaced_by_new_file_is_left_alone(tmp_path):
    p = tmp_path / "x.wav"
    p.write_bytes(b"old")
    lst = os.lstat(p)
    os.unlink(p)
    keep = tmp_path / "hold"
    keep.write_bytes(b"new arrival")     # holds a different inode...
    os.rename(keep, p)                  # ...now under the same name
    fd = open_dir(tmp_path)
    try:
        d = destroy_entry(fd, "x.wav", max_bytes=MiB, expect=lst)
    finally:
        os.close(fd)
    assert d.gone and not d.unlinked and p.read_bytes() == b"new arrival"


# -- bounded overwrite (finding 2) ----------------------------------------------------
def test_sparse_terabyte_file_costs_only_its_allocated_blocks(tmp_path):
    p = tmp_path / "huge.wav"
    with open(p, "wb") as f:
        f.truncate(1 << 40)             # 1 TiB apparent size, nothing allocated
        f.seek(1 << 39)
        f.write(b"\x7f" * 4096)         # one block of data in the middle
    st = os.stat(p)
    if st.st_blocks * 512 > 1 << 20:
        pytest.skip("this file system does not keep sparse files sparse")
    reader = os.open(p, os.O_RDONLY)    # keeps the inode readable after the unlink
    try:
        d = destroy_path(p, max_bytes=16 * MiB)
        assert d.unlinked
        assert 0 < d.overwritten_bytes <= st.st_blocks * 512
        assert os.pread(reader, 4096, 1 << 39) == b"\0" * 4096   # the data extent itself was zeroed
        assert os.fstat(reader).st_blocks <= st.st_blocks           # no hole was filled
    finally:
        os.close(reader)


def test_allocated_data_above_the_cap_is_unlinked_without_overwrite(tmp_path):
    p = tmp_path / "big.wav"
    p.write_bytes(b"\x01" * (3 * MiB))
    d = destroy_path(p, max_bytes=1 * MiB)
    assert d.unlinked and d.skipped == "too_large" and d.overwritten_bytes == 0


def test_overwrite_zeroes_every_byte(tmp_path):
    p = tmp_path / "x.wav"
    p.write_bytes(os.urandom(300_000))
    fd = os.open(p, os.O_RDWR)
    try:
        n, why = overwrite_fd(fd, MiB)
        assert (n, why) == (300_000, None)
        assert os.pread(fd, 300_000, 0) == b"\0" * 300_000
    finally:
        os.close(fd)


def test_deadline_stops_the_overwrite_but_not_the_unlink(tmp_path):
    p = tmp_path / "x.wav"
    p.write_bytes(b"\x02" * (2 * MiB))
    d = destroy_path(p, max_bytes=4 * MiB, deadline=0.0)   # already past
    assert d.unlinked and d.skipped == "deadline" and d.overwritten_bytes == 0


def test_negative_cap_is_refused(tmp_path):
    p = tmp_path / "x.wav"
    p.write_bytes(b"1")
    fd = os.open(p, os.O_RDWR)
    try:
        with pytest.raises(ValueError, match="max_bytes"):
            overwrite_fd(fd, -1)
    finally:
        os.close(fd)


def test_plain_names_only(tmp_path):
    fd = open_dir(tmp_path)
    try:
        for bad in ("../x", "a/b", "..", ".", "", "a\0b"):
            with pytest.raises(ValueError, match="plain entry name"):
                destroy_entry(fd, bad, max_bytes=MiB)
    finally:
        os.close(fd)


@pytest.mark.slow
def test_race_10000_swaps_of_entries_and_subfolders_for_links(tmp_path, outside):
    """A thread swaps tree entries and subfolders for links to the outside 10,000 times while trees are destroyed."""
    before = snapshot(outside)
    t = tmp_path / "tree"
    (t / "sub").mkdir(parents=True)
    entries = [("sub", outside, real_dir({"y.wav": b"q" * 100})),
               ("x.wav", outside / "keep0.wav", real_file(b"q" * 100))]
    rounds = 0
    with LinkSwaps(t, tmp_path, entries) as race:
        while race.running:
            fd = open_dir(t)
            try:
                destroy_tree(fd, max_bytes=MiB)
            finally:
                os.close(fd)
            rounds += 1
    assert race.swaps >= 10_000 and rounds > 0
    assert snapshot(outside) == before
