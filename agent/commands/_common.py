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


class Progress:
    """A one-line progress bar on a terminal; silent when stderr is not a TTY."""

    def __init__(self, total: int, label: str, stream=None):
        self.total = max(int(total), 1)
        self.label = label
        self.stream = stream or sys.stderr
        self.enabled = self.stream.isatty()
        self.n = 0

    def update(self, k: int = 1) -> None:
        self.n += k
        if self.enabled:
            frac = min(self.n / self.total, 1.0)
            bar = "#" * int(frac * 30)
            self.stream.write(f"\r{self.label} [{bar:<30}] {self.n}/{self.total}")
            self.stream.flush()

    def close(self) -> None:
        if self.enabled:
            self.stream.write("\n")
            self.stream.flush()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
