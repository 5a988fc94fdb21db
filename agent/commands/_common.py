"""Helpers shared by command handlers: home resolution, JSON output, progress."""

from __future__ import annotations

import json
import sys

from ..home import Home


def add_json(p) -> None:
    p.add_argument("--json", action="store_true", help="print machine-readable JSON instead of text")


def home_from(args) -> Home:
    return Home(getattr(args, "home", None))


def emit(args, obj, text: str | None = None) -> None:
    """Print ``obj`` as JSON when ``--json`` was given, else ``text`` (or the JSON)."""
    if getattr(args, "json", False) or text is None:
        json.dump(obj, sys.stdout, indent=2, sort_keys=True, default=_default)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(text if text.endswith("\n") else text + "\n")


def _default(o):
    try:
        import numpy as np

        if isinstance(o, np.generic):
            return o.item()
        if isinstance(o, np.ndarray):
            return o.tolist()
    except ImportError:  # pragma: no cover
        pass
    if hasattr(o, "isoformat"):
        return o.isoformat()
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


def progress(total: int | None, desc: str, unit: str = "it", stream=None):
    """A tqdm progress bar on stderr when stderr is a terminal; silent (disabled) otherwise."""
    from tqdm import tqdm

    stream = stream or sys.stderr
    return tqdm(total=total, desc=desc, unit=unit, file=stream, disable=not stream.isatty(), leave=False,
                dynamic_ncols=True)
