"""Moved to :mod:`agent.export` (``payload.py`` builds and checks, ``preview.py`` words it).

These names stay importable from here for code written before the split; new
code imports :mod:`agent.export`.
"""

from __future__ import annotations

from .export.payload import *  # noqa: F403
from .export.payload import __all__ as _payload_all
from .export.preview import preview

__all__ = [*_payload_all, "preview"]
