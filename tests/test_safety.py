"""Safety rules of intake, one test each: links, devices, pipes, sizes, odd names, swaps."""

from __future__ import annotations

import os
import socket
import stat

import pytest

from intake_samples import T0, drop, mood_csv_bytes, our_files, stamp, wav_bytes


@pytest.fixture
def outside(tmp_path):
    """A participant's own file outside the inbox, with its bytes and metadata."""
    d = tmp_path / "elsewhere"
    d.mkdir()
    p = d / f"diary_{stamp(T0)}.wav"
    p.write_bytes(wav_bytes(seed=7))
    return p


def _snapshot(p):
    st = os.lstat(p)
    return p.read_bytes(), st.st_mtime_ns, st.st_ino


def _drain(h):
    from agent.intake.pipeline import drain

    return drain(h, h.load_policy(), settle_s=0.0)


def _vault_rows(h) -> int:
    from agent.vault import Vault

    with Vault.open(h) as v:
        return sum(n for t, n in v.tables().items() if t != "intake_items")


# -- symlinks ------------------------------------------------------------------
def test_symlink_to_outside_file_is_removed_target_untouched(h, outside):
    before = _snapshot(outside)
    os.symlink(outside, h.inbox / f"snd_{stamp(T0)}.wav")
    rep = _drain(h)
    assert rep.reasons == {"symlink": 1}
    assert our_files(h.inbox) == []
    assert _snapshot(outside) == before
    assert _vault_rows(h) == 0  # the target was never read


def test_symlink_to_outside_directory_is_removed_directory_untouched(h, outside):
    os.symlink(outside.parent, h.inbox / "photos")
    _drain(h)
    assert our_files(h.inbox) == []
    assert outside.exists() and sorted(os.listdir(outside.parent)) == [outside.name]


def test_dangling_symlink_is_removed(h, tmp_path):
    os.symlink(tmp_path / "nowhere", h.inbox / "gone.wav")
    rep = _drain(h)
    assert rep.reasons == {"symlink": 1} and our_files(h.inbox) == []


def test_file_swapped_for_symlink_after_lstat_is_not_followed(h, outside):
    from agent.intake.safety import InboxDir, UnsafeEntry

    p = drop(h.inbox, "x.wav", b"RIFF")
    with InboxDir(h.inbox, 1 << 20) as inbox:
        lst = inbox.lstat("x.wav")
        os.unlink(p)
        os.symlink(outside, p)
        with pytest.raises(UnsafeEntry) as e:
            inbox.open("x.wav", lst)
    assert e.value.reason == "symlink"


def test_inbox_that_is_a_symlink_is_refused(tmp_path):
    from agent.errors import StateError
    from agent.intake.safety import InboxDir

    real = tmp_path / "real"
    real.mkdir()
    os.symlink(real, tmp_path / "inbox")
    with pytest.raises(StateError, match="real directory"):
        InboxDir(tmp_path / "inbox", 1024)


# -- hardlinks -------------------------------------------------------------------
def test_hardlink_is_not_read_and_outside_name_survives(h, outside):
    before = _snapshot(outside)
    os.link(outside, h.inbox / f"snd_{stamp(T0)}.wav")
    rep = _drain(h)
    assert rep.reasons == {"hardlink": 1}
    assert our_files(h.inbox) == []
    assert _snapshot(outside) == before          # bytes not overwritten
    assert os.lstat(outside).st_nlink == 1       # only our name went
    assert _vault_rows(h) == 0


def test_hardlink_made_after_open_is_not_overwritten(h, outside):
    from agent.intake.safety import InboxDir

    data = b"x" * 100
    p = drop(h.inbox, "a.mood.csv", data)
    with InboxDir(h.inbox, 1 << 20) as inbox:
        lst = inbox.lstat("a.mood.csv")
        opened = inbox.open("a.mood.csv", lst)
        other = outside.parent / "copy"
        os.link(p, other)  # someone links it elsewhere while we hold it
        assert inbox.destroy("a.mood.csv", opened)
    assert other.read_bytes() == data


# -- pipes, sockets, devices, directories ------------------------------------------
@pytest.mark.timeout(20)
def test_fifo_is_never_opened_and_removed(h):
    os.mkfifo(h.inbox / "stream.nmea")
    rep = _drain(h)  # would block forever if the FIFO were opened for reading
    assert rep.reasons == {"fifo": 1} and our_files(h.inbox) == []


def test_socket_is_removed_unopened(h):
    s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    try:
        s.bind(str(h.inbox / "s.wav"))
    except OSError as e:  # path too long for AF_UNIX on some systems
        pytest.skip(f"cannot bind a socket here: {e}")
    try:
        rep = _drain(h)
    finally:
        s.close()
    assert rep.reasons == {"socket": 1} and our_files(h.inbox) == []


def test_device_node_is_never_opened(h):
    try:
        os.mknod(h.inbox / "zero.wav", stat.S_IFCHR | 0o600, os.makedev(1, 5))  # /dev/zero's numbers
    except PermissionError:
        pytest.skip("creating a device node needs privileges")
    rep = _drain(h)
    assert rep.reasons == {"device": 1} and our_files(h.inbox) == []


def test_file_in_subfolder_is_taken_and_the_folder_kept(h):
    """Finding 7: phone sync tools create dated subfolders; their files are raw data too."""
    sub = h.inbox / "later"
    sub.mkdir()
    inner = sub / f"snd_{stamp(T0)}.wav"
    inner.write_bytes(wav_bytes())
    rep = _drain(h)
    assert not inner.exists() and sub.is_dir()   # the file is destroyed, the folder is never removed
    assert rep.total("received") == 1 and rep.total("featurised") == 1


def test_symlinked_subfolder_is_removed_never_entered(h, outside):
    before = _snapshot(outside)
    os.symlink(outside.parent, h.inbox / "photos")
    rep = _drain(h)
    assert rep.reasons == {"symlink": 1} and _snapshot(outside) == before


# -- sizes -------------------------------------------------------------------------
def test_oversize_file_is_rejected_and_destroyed(h):
    cap = h.load_policy().intake.max_file_bytes
    p = h.inbox / "huge.wav"
    with open(p, "wb") as f:
        f.truncate(cap + 1)  # sparse: cheap to make
    rep = _drain(h)
    assert rep.reasons == {"too_large": 1} and our_files(h.inbox) == []


def test_destruction_overwrites_through_the_descriptor(h):
    # A reader that kept the file open sees zeros after destruction: the bytes
    # were overwritten in place before the unlink (best effort, docs/intake.md).
    data = mood_csv_bytes(h.load_policy())
    p = drop(h.inbox, "m.mood.csv", data)
    fd = os.open(p, os.O_RDONLY)
    try:
        _drain(h)
        assert not p.exists()
        assert os.pread(fd, len(data) + 10, 0) == b"\0" * len(data)
    finally:
        os.close(fd)


def test_read_stops_at_the_cap(h):
    from agent.intake.safety import InboxDir, UnsafeEntry

    drop(h.inbox, "a.mood.csv", b"y" * 2000)
    with InboxDir(h.inbox, 2048) as inbox:
        opened = inbox.open("a.mood.csv", inbox.lstat("a.mood.csv"))
        with open(h.inbox / "a.mood.csv", "ab") as f:
            f.write(b"z" * 1000)  # grows past the cap after the checks
        with pytest.raises(UnsafeEntry) as e:
            inbox.read(opened)
        opened.close()
    assert e.value.reason == "too_large"


# -- names -----------------------------------------------------------------------
@pytest.mark.parametrize("name", [f"my snd {stamp(T0)}.wav", f"sön_ð_{stamp(T0)}_日本.wav",
                                  f"line\nbreak_{stamp(T0)}.wav", f"-dash_{stamp(T0)}.wav"])
def test_odd_names_are_processed(h, name):
    drop(h.inbox, name, wav_bytes())
    rep = _drain(h)
    assert rep.featurised == {"audio": 1} and our_files(h.inbox) == []


def test_newline_in_name_is_escaped_in_errors(h):
    drop(h.inbox, "bad\nname.wav", b"not audio at all")
    rep = _drain(h)
    assert rep.errors and "\n" not in rep.errors[0] and "bad\\nname.wav" in rep.errors[0]


def test_names_with_separators_are_refused():
    from agent.intake.safety import _check_name

    for bad in ("../x", "a/../b", "a//b", "/a", "..", ".", "", "a\0b"):
        with pytest.raises(ValueError):
            _check_name(bad)
    assert _check_name("2026-11-04/snd.wav") == ["2026-11-04", "snd.wav"]  # a subfolder path is fine


# -- swaps -------------------------------------------------------------------------
def test_destroy_leaves_a_name_that_now_refers_to_another_file(h):
    from agent.intake.safety import InboxDir

    p = drop(h.inbox, "a.mood.csv", b"one")
    with InboxDir(h.inbox, 1 << 20) as inbox:
        opened = inbox.open("a.mood.csv", inbox.lstat("a.mood.csv"))
        os.unlink(p)
        p.write_bytes(b"two")  # a new file under the same name
        assert inbox.destroy("a.mood.csv", opened) is True   # our inode is gone from the name...
    assert p.read_bytes() == b"two"                              # ...and the new file was left alone


def test_file_replaced_between_lstat_and_open_is_looked_at_again(h):
    from agent.intake.safety import InboxDir, UnsafeEntry

    p = drop(h.inbox, "a.mood.csv", b"one")
    with InboxDir(h.inbox, 1 << 20) as inbox:
        lst = inbox.lstat("a.mood.csv")
        os.unlink(p)
        p.write_bytes(b"two")
        with pytest.raises(UnsafeEntry) as e:
            inbox.open("a.mood.csv", lst)
    assert e.value.reason == "changed"


def test_ignored_names_are_left_for_the_writer(h):
    drop(h.inbox, "x.mood.csv", b"a")
    (h.inbox / "y.wav.part").write_bytes(b"in progress")
    (h.inbox / ".hidden.wav").write_bytes(b"in progress")
    _drain(h)
    assert sorted(os.listdir(h.inbox)) == [".hidden.wav", "y.wav.part"]
