"""One reader per inbox format, and :func:`featurise`, the pipeline's entry point.

Each reader parses **bytes** (the pipeline has already opened the file safely
and capped its size; nothing here opens a path), validates against the policy
and either returns an :class:`~agent.intake.item.ItemResult` or raises
:class:`~agent.errors.RejectedInput` with a stable reason code.  The formats
and codes are the contract in ``docs/inbox-formats.md``.
"""

from __future__ import annotations

from ..item import SUFFIXES, ItemResult, classify, suffix_of
from ._common import reject

_KIND_OF_SUFFIX = dict(SUFFIXES)


def featurise(path, data: bytes, policy, *, now: float | None = None) -> ItemResult:
    """Read, validate and featurise one raw file.

    Parameters
    ----------
    path : str or path-like
        The file's name or path, used only for its suffix, the timestamp in an
        audio file's name, and error messages.  It is never opened.
    data : bytes
        The file's complete contents.
    policy : agent.policy.Policy
        The enrolled policy (sampling schedule, intake limits, emotions).
    now : float, optional
        Unix seconds used for the "not in the future" check; defaults to the
        current time.  The demo's backfill passes its simulated clock.

    Returns
    -------
    ItemResult

    Raises
    ------
    agent.errors.RejectedInput
        With ``reason`` one of the codes in ``docs/inbox-formats.md``.
    """
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise TypeError(f"data must be bytes, got {type(data).__name__}")
    data = bytes(data)
    suffix = suffix_of(path)
    kind = _KIND_OF_SUFFIX.get(suffix) if suffix is not None else None
    if kind is None:
        reject(path, "unknown_format",
               "unrecognised file name suffix; expected .wav .flac .ogg .gpx .nmea .gps.csv "
               ".accel.csv .accel.wav .mood.csv or .mood.json")
    if len(data) == 0:
        reject(path, "empty", "zero-byte file")
    cap = int(policy.intake.max_file_bytes)
    if len(data) > cap:
        reject(path, "too_large", f"{len(data)} bytes exceeds intake.max_file_bytes = {cap}")
    if kind == "audio":
        from .audio import read_audio
        from ..features import audio_features

        clip = read_audio(path, data, policy, now=now)
        return audio_features(clip, policy)
    if kind == "accel":
        from .accel import read_accel, read_accel_wav
        from ..features import accel_features

        read = read_accel_wav if suffix == ".accel.wav" else read_accel
        return accel_features(read(path, data, policy, now=now), policy)
    if kind == "gps":
        from .gps import read_gps

        return read_gps(path, data, policy, suffix=suffix, now=now)
    from .mood import read_mood

    return read_mood(path, data, policy, suffix=suffix, now=now)


__all__ = ["featurise", "classify", "ItemResult"]
