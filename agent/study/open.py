"""``lethe study open``: verify, decrypt and store bundles from enrolled devices.

Each opened bundle is stored as ``STUDYDIR/received/<pseudonym>/<seq>.json``
holding ``{"header": {...}, "payload": {...}}`` (the audit report reads
``payload["ledger_digest"]`` from there), and its sequence number and SHA-256
are added to the registry.  A bundle that fails any check writes nothing.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

from ..errors import DataError, LetheError
from ..home import write_private


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


def open_bundle_bytes(study_dir, data: bytes, study_key, source: str) -> OpenResult:
    """Verify one bundle's bytes and store it (under the registry lock)."""
    from ..bundle import read_bundle
    from .card import study_card
    from .registry import Registry, locked

    card = study_card(study_dir)
    with locked(study_dir):
        reg = Registry.load(study_dir)
        opened = read_bundle(data, registry=reg, study_key=study_key,
                             approved_policies=card.approved_policies, source=source)
        seq = opened.header["seq"]
        dest = reg.received_path(opened.pseudonym, seq)
        write_private(dest, (json.dumps({"header": opened.header, "payload": opened.payload},
                                        indent=1, sort_keys=True) + "\n").encode())
        reg.devices[opened.pseudonym].seen[str(seq)] = opened.sha256
        reg.save()
    return OpenResult(source, True, opened.pseudonym, seq, str(dest))


def open_bundles(study_dir, paths, passphrase, *, strict: bool = True) -> list[OpenResult]:
    """Open bundle files for the study in ``study_dir``.

    Parameters
    ----------
    study_dir : path-like
    paths : iterable of path-like
    passphrase : bytes or str
        The study key passphrase.
    strict : bool
        True: raise the first failure's error (bundles before it stay opened).
        False: return a failed :class:`OpenResult` for it and go on.
    """
    from .keys import load_study_key

    key = load_study_key(study_dir, passphrase)
    out = []
    for p in paths:
        p = Path(p)
        try:
            try:
                data = p.read_bytes()
            except OSError as e:
                raise DataError(f"{p}: cannot read the bundle: {e.strerror}") from None
            out.append(open_bundle_bytes(study_dir, data, key, str(p)))
        except LetheError as e:
            if strict:
                raise
            out.append(OpenResult(str(p), False, error=str(e), exit_code=e.exit_code))
    return out
