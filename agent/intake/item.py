"""What intake produces for one raw file, and which reader a file name selects.

Kept free of heavy imports: the watcher calls :func:`classify` and
:func:`ignored` on every file-system event.
"""

from __future__ import annotations

from dataclasses import dataclass, field

KINDS = ("audio", "gps", "accel", "mood")

# Longest suffix first: ".gps.csv" must win over a bare ".csv" (which is unknown).
SUFFIXES: tuple[tuple[str, str], ...] = (
    (".accel.csv", "accel"),
    (".accel.wav", "accel"),
    (".gps.csv", "gps"),
    (".mood.csv", "mood"),
    (".mood.json", "mood"),
    (".wav", "audio"),
    (".flac", "audio"),
    (".ogg", "audio"),
    (".gpx", "gps"),
    (".nmea", "gps"),
)


def classify(name) -> str | None:
    """The kind of raw file a name denotes, by suffix, or ``None`` if unknown.

    Parameters
    ----------
    name : str or path-like
        A file name or path; only the final component is examined and the
        comparison is case-insensitive (``SND_…WAV`` is audio).

    Returns
    -------
    str or None
        ``'audio'``, ``'gps'``, ``'accel'``, ``'mood'``, or ``None``: the
        pipeline then rejects the file as ``unknown_format``.
    """
    base = _basename(name).lower()
    for suffix, kind in SUFFIXES:
        if base.endswith(suffix) and len(base) > len(suffix):
            return kind
    return None


def suffix_of(name) -> str | None:
    """The recognised suffix of ``name`` (``'.gps.csv'``), or ``None``."""
    base = _basename(name).lower()
    for suffix, _ in SUFFIXES:
        if base.endswith(suffix) and len(base) > len(suffix):
            return suffix
    return None


def ignored(name) -> bool:
    """True for names a writer has not finished: ``*.part`` or starting with ``.``."""
    base = _basename(name)
    return base.startswith(".") or base.lower().endswith(".part")


def _basename(name) -> str:
    s = str(name)
    # Both separators: a recorder on another system may have produced the name.
    return s.replace("\\", "/").rsplit("/", 1)[-1]


@dataclass
class ItemResult:
    """The features of one raw file, ready for the vault.

    Attributes
    ----------
    kind : str
        ``'audio'``, ``'gps'``, ``'accel'`` or ``'mood'``.
    rows : dict
        ``{table: [(rid_suffix, payload), ...]}``.  The vault record id is
        ``item_id + rid_suffix``: the suffix is ``""`` for one-row tables
        (``audio_features``, ``accel_features``) and ``":0"``, ``":1"``, … for
        per-row tables (``gps_fixes``, ``mood_reports``), matching
        ``docs/architecture.md``.  Payloads are plain JSON types.
    warnings : list of str
        Human-readable notes without content (counts of skipped sentences,
        dropped fixes, gaps).  Safe to log.
    n_samples : int
        Audio frames decoded, accelerometer rows, fixes or reports read.
    dropped : dict
        ``{reason_code: count}`` of parts of the file skipped while reading.
    t_start, t_end : float or None
        Unix seconds (UTC) covered by the file.
    """

    kind: str
    rows: dict[str, list[tuple[str, dict]]]
    warnings: list[str] = field(default_factory=list)
    n_samples: int = 0
    dropped: dict[str, int] = field(default_factory=dict)
    t_start: float | None = None
    t_end: float | None = None

    def n_rows(self) -> int:
        return sum(len(v) for v in self.rows.values())
