"""``lethe study open``: verify, decrypt and store bundles from enrolled devices.

Each opened bundle is stored as ``STUDYDIR/received/<pseudonym>/<seq>.json``
holding ``{"header": {...}, "payload": {...}, "sha256": hex}`` (the audit
report reads ``payload["ledger_digest"]`` from there), and its sequence number
and SHA-256 are added to the registry.  A bundle that fails any check writes
nothing.

Scale and failure behaviour (fail closed, keep going):

* the registry is loaded once and saved once per call, under one lock, so
  opening ``n`` bundles costs ``O(n)``;
* a folder argument stands for every ``*.lethe`` file below it (sorted, links
  not followed);
* a file's size is checked against the largest bundle the framing allows
  (:data:`agent.bundle.MAX_BUNDLE_BYTES`) before a byte of it is read;
* JSON inside a bundle is parsed with bounded depth and numbers
  (:mod:`agent.study.bounded`);
* with ``strict=False`` one bad bundle, whatever its fault, yields a failed
  :class:`OpenResult` and the batch goes on.
"""

from __future__ import annotations

import json
import os
import stat
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path

from ..errors import EXIT_DATA, DataError, LetheError, StateError
from ..fsutil import fsync_dir


@dataclass
class OpenResult:
    path: str
    ok: bool
    pseudonym: str | None = None
    seq: int | None = None
    stored: str | None = None
    error: str | None = None
    exit_code: int = 0

    def as_dict(self) -> dict:
        return dict(self.__dict__)


def bundle_paths(inputs: Iterable) -> Iterator[Path]:
    """Expand folders into the ``*.lethe`` files below them (sorted; symbolic links are not followed)."""
    from ..bundle import SUFFIX

    for p in inputs:
        p = Path(p)
        if p.is_dir() and not p.is_symlink():
            found: list[Path] = []
            for root, dirs, files in os.walk(p, followlinks=False):
                dirs.sort()
                found.extend(Path(root) / f for f in sorted(files) if f.endswith(SUFFIX) and not f.startswith("."))
            yield from found
        else:
            yield p


def read_bundle_file(path) -> bytes:
    """Read a bundle file after checking that it is a regular file no larger than a bundle can be."""
    from ..bundle import MAX_BUNDLE_BYTES

    p = Path(path)
    try:
        fd = os.open(p, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    except FileNotFoundError:
        raise DataError(f"{p}: no such bundle file") from None
    except OSError as e:
        raise DataError(f"{p}: cannot read the bundle: {e.strerror}") from None
    try:
        st = os.fstat(fd)
        if not stat.S_ISREG(st.st_mode):
            raise DataError(f"{p}: not a regular file; a bundle is a file")
        if st.st_size > MAX_BUNDLE_BYTES:
            raise DataError(f"{p}: {st.st_size} bytes is larger than any bundle can be "
                            f"({MAX_BUNDLE_BYTES} bytes at most); not read")
        chunks, left = [], st.st_size + 1  # one byte more shows a file that grew while being read
        while left > 0:
            b = os.read(fd, min(left, 1 << 20))
            if not b:
                break
            chunks.append(b)
            left -= len(b)
        data = b"".join(chunks)
        if len(data) > MAX_BUNDLE_BYTES:
            raise DataError(f"{p}: the file grew past the largest bundle size while being read; not opened")
        return data
    except OSError as e:
        raise DataError(f"{p}: cannot read the bundle: {e.strerror}") from None
    finally:
        os.close(fd)


def _store(reg, opened, *, sync: bool) -> Path:
    """Write one opened bundle's record; refuses a different bundle already stored under that number."""
    dest = reg.received_path(opened.pseudonym, opened.header["seq"])
    if dest.exists():
        try:
            old = json.loads(dest.read_text("utf-8")).get("sha256")
        except (OSError, ValueError):
            old = None
        if old == opened.sha256:
            return dest  # stored by an earlier call that stopped before saving the registry
        raise StateError(f"replayed sequence number: {opened.pseudonym} already sent a different "
                         f"bundle #{opened.header['seq']}; refusing the second one")
    dest.parent.mkdir(parents=True, exist_ok=True, mode=0o700)
    tmp = dest.with_name(f".{dest.name}.tmp{os.getpid()}")
    data = (json.dumps({"header": opened.header, "payload": opened.payload, "sha256": opened.sha256},
                       sort_keys=True) + "\n").encode()
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_NOFOLLOW, 0o600)
    try:
        os.write(fd, data)
        if sync:
            os.fsync(fd)
    finally:
        os.close(fd)
    os.replace(tmp, dest)
    return dest


def open_bundle_bytes(study_dir, data: bytes, study_key, source: str) -> OpenResult:
    """Verify one bundle's bytes and store it (under the registry lock)."""
    return _open_many(study_dir, [(source, lambda: data)], study_key, strict=True)[0]


def previous_log(reg, pseudonym: str, seq: int) -> dict | None:
    """The ``log`` section of the latest bundle opened from ``pseudonym`` before ``seq`` (None if none)."""
    dev = reg.devices.get(pseudonym)
    earlier = sorted((int(s) for s in (dev.seen if dev else {}) if int(s) < seq), reverse=True)
    for s in earlier:
        try:
            stored = json.loads(reg.received_path(pseudonym, s).read_text("utf-8"))
        except (OSError, ValueError):
            continue
        return stored.get("payload", {}).get("log")
    return None


def check_continuity(reg, pseudonym: str, seq: int, payload: dict, source: str) -> None:
    """Refuse a bundle whose ledger does not extend the one seen before (docs/ledger.md).

    Compares the bundle's ``log`` section with the last opened bundle of the
    same device and with the log origin in its enrolment
    (:func:`agent.ledger.verify_log_continuity`); a reset, a rollback, a
    rewrite or counts that go down raise :class:`~agent.errors.IntegrityError`.
    """
    from ..errors import IntegrityError
    from ..ledger.verify import verify_log_continuity

    prev = previous_log(reg, pseudonym, seq)
    current = payload.get("log")
    dev = reg.devices.get(pseudonym)
    origin = getattr(dev, "log_origin", None)
    if current is None and prev is None and origin is None:
        return  # a device whose bundles never carried a log section (before ledger format 2)
    problems = verify_log_continuity(prev, current, origin=origin)
    if problems:
        raise IntegrityError(f"{source}: the device's ledger does not continue the one seen before: "
                             + "; ".join(problems))


def open_bundles(study_dir, paths, passphrase, *, strict: bool = True) -> list[OpenResult]:
    """Open bundle files for the study in ``study_dir``.

    Parameters
    ----------
    study_dir : path-like
    paths : iterable of path-like
        Bundle files, or folders holding them.
    passphrase : bytes or str
        The study key passphrase.
    strict : bool
        True: raise the first failure's error (bundles before it stay opened).
        False: return a failed :class:`OpenResult` for each bad bundle and go on.
    """
    from .keys import load_study_key

    key = load_study_key(study_dir, passphrase)
    items = [(str(p), (lambda p=p: read_bundle_file(p))) for p in bundle_paths(paths)]
    return _open_many(study_dir, items, key, strict=strict)


def _open_many(study_dir, items, study_key, *, strict: bool) -> list[OpenResult]:
    from ..bundle import read_bundle
    from .card import study_card
    from .registry import Registry, locked

    card = study_card(study_dir)
    out: list[OpenResult] = []
    stored_dirs: set[Path] = set()
    with locked(study_dir):
        reg = Registry.load(study_dir)
        try:
            for source, read in items:
                try:
                    opened = read_bundle(read(), registry=reg, study_key=study_key,
                                         approved_policies=card.approved_policies, source=source)
                    check_continuity(reg, opened.pseudonym, opened.header["seq"], opened.payload, source)
                    try:
                        dest = _store(reg, opened, sync=False)
                    except StateError as e:
                        raise StateError(f"{source}: {e}") from None
                    stored_dirs.add(dest.parent)
                    reg.devices[opened.pseudonym].seen[str(opened.header["seq"])] = opened.sha256
                    out.append(OpenResult(source, True, opened.pseudonym, opened.header["seq"], str(dest)))
                except LetheError as e:
                    if strict:
                        raise
                    out.append(OpenResult(source, False, error=str(e), exit_code=e.exit_code))
                except (RecursionError, MemoryError, OverflowError, ValueError, TypeError, KeyError) as e:
                    # A fault the checks above did not foresee: this bundle fails closed, the batch goes on.
                    err = DataError(f"{source}: could not be opened ({type(e).__name__}: {e}); nothing stored")
                    if strict:
                        raise err from e
                    out.append(OpenResult(source, False, error=str(err), exit_code=EXIT_DATA))
        finally:
            if stored_dirs:
                _sync_received(stored_dirs)
                reg.save()
    return out


def _sync_received(dirs: set[Path]) -> None:
    """Make the stored records durable before the registry names them (one sync, not one per file)."""
    os.sync()
    for d in dirs:
        fsync_dir(d)
    if dirs:
        fsync_dir(next(iter(dirs)).parent)
