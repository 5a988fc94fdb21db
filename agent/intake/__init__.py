"""Intake: raw inbox files in, validated features out.

Light on import: :func:`classify` and :func:`ignored` are pure string tests and
:func:`featurise` imports numpy, soundfile and librosa only when first called.
The watcher and the destruction pipeline live in ``watcher.py`` and
``pipeline.py``; the formats are specified in ``docs/inbox-formats.md``.
"""

from __future__ import annotations

from .item import KINDS, ItemResult, classify, ignored


def featurise(path, data: bytes, policy, *, now: float | None = None) -> ItemResult:
    """Validate one raw file given as bytes and compute its features.

    See :func:`agent.intake.readers.featurise`; this wrapper defers the heavy
    imports until the first file arrives.
    """
    from .readers import featurise as _featurise

    return _featurise(path, data, policy, now=now)


def warm_up(policy=None) -> float:
    """Run every feature once on a tiny input (fills numba's cache); returns seconds."""
    from .features import warm_up as _warm_up

    return _warm_up(policy)


__all__ = ["KINDS", "ItemResult", "classify", "featurise", "ignored", "warm_up"]
