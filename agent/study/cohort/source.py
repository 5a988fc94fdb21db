"""Where the cohort's opened bundles come from.

A *cohort source* yields ``(pseudonym, seq, {"header", "payload"})`` records
one at a time, so that cohort work runs in constant memory, and knows each
participant's latest sequence number and who withdrew.  Two sources exist:
the study folder (:class:`FolderSource`, what ``lethe study open`` fills) and
the study server's database (:class:`agent.study.server.store.Store`).
Withdrawn participants are left out unless asked for: their certificate stays
on record, their data leaves every analysis.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Protocol


class CohortSource(Protocol):
    study_id: str

    def participants(self, *, include_withdrawn: bool = False) -> list[dict]:
        """``{"pseudonym", "enrolled", "withdrawn", "policy_fingerprint", "bundles", "latest_seq"}`` each."""
        ...

    def records(self, *, latest_only: bool = False,
                include_withdrawn: bool = False) -> Iterator[tuple[str, int, dict]]:
        ...


class FolderSource:
    """Opened bundles in ``STUDYDIR/received/`` with the registry beside them."""

    def __init__(self, study_dir):
        from ..registry import Registry

        self.study_dir = Path(study_dir)
        self.registry = Registry.load(self.study_dir)
        self.study_id = self.registry.study_id

    def participants(self, *, include_withdrawn: bool = False) -> list[dict]:
        out = []
        for name, d in sorted(self.registry.devices.items()):
            if d.withdrawn and not include_withdrawn:
                continue
            seqs = [int(s) for s in d.seen]
            out.append({"pseudonym": name, "enrolled": d.enrolled, "withdrawn": d.withdrawn,
                        "policy_fingerprint": d.policy_fingerprint, "bundles": len(seqs),
                        "latest_seq": max(seqs, default=None)})
        return out

    def records(self, *, latest_only: bool = False,
                include_withdrawn: bool = False) -> Iterator[tuple[str, int, dict]]:
        import json

        for p in self.participants(include_withdrawn=include_withdrawn):
            seqs = sorted(int(s) for s in self.registry.devices[p["pseudonym"]].seen)
            if latest_only:
                seqs = seqs[-1:]
            for seq in seqs:
                f = self.registry.received_path(p["pseudonym"], seq)
                if f.exists():
                    yield p["pseudonym"], seq, json.loads(f.read_text("utf-8"))


def as_source(study_or_source) -> CohortSource:
    """A study folder (path) becomes a :class:`FolderSource`; a source is returned as it is."""
    if isinstance(study_or_source, str | Path):
        return FolderSource(study_or_source)
    return study_or_source
