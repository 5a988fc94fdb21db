"""Shared matplotlib helpers for the reports (board, cohort, study).

Figures are made with the object-oriented API on an Agg canvas, never through
``pyplot``'s global state, so reports can be drawn from any thread; the style
is applied with :func:`styled` inside an ``rc_context`` and never touches the
global ``rcParams``.  PNGs carry fixed metadata so the same data give the same
bytes.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from pathlib import Path
from typing import Any, TypeVar

__all__ = ["PLOT_STYLE", "empty", "figure", "integer_ticks", "save", "styled"]

PLOT_STYLE = {"font.size": 11, "axes.titlesize": 14, "axes.titleweight": "bold", "axes.labelsize": 12,
              "xtick.labelsize": 10, "ytick.labelsize": 10, "legend.fontsize": 10,
              "axes.spines.top": False, "axes.spines.right": False}

F = TypeVar("F", bound=Callable[..., Any])


def styled(plot: F) -> F:
    """Run a plot function under :data:`PLOT_STYLE` without touching global rcParams."""

    @functools.wraps(plot)
    def wrapper(*args, **kwargs):
        import matplotlib

        # matplotlib's stubs type rc keys as a Literal of every rc name; a plain str-keyed dict is what it takes
        with matplotlib.rc_context(PLOT_STYLE):  # type: ignore[arg-type]
            return plot(*args, **kwargs)

    return wrapper  # type: ignore[return-value]


def figure(w: float = 6.4, h: float = 3.8):
    """A new figure of ``w`` x ``h`` inches at 110 dpi on an Agg canvas."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(w, h), dpi=110)
    FigureCanvasAgg(fig)
    return fig


def save(fig, path: Path) -> None:
    """Tight layout, then a PNG at ``path`` with fixed metadata (same data, same bytes)."""
    fig.tight_layout()
    fig.savefig(path, format="png", metadata={"Software": None})


def integer_ticks(axis) -> None:
    """Integer-only major ticks on ``axis`` (counts)."""
    from matplotlib.ticker import MaxNLocator

    axis.set_major_locator(MaxNLocator(integer=True))


def empty(ax, text: str) -> None:
    """A centred note in place of a plot that has no data."""
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes, fontsize=12, color="#555")
    ax.set_xticks([])
    ax.set_yticks([])
