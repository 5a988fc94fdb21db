"""Cohort plots that stay readable at 1,000 participants: distributions, never one row per person.

Each function takes plain lists of numbers and returns PNG bytes (matplotlib,
Agg backend), or None when there is nothing to draw.
"""

from __future__ import annotations

import io
from collections.abc import Mapping, Sequence


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, bbox_inches="tight")
    _plt().close(fig)
    return buf.getvalue()


def paired_differences(diffs: Mapping[str, Sequence[float]], *, metric: str = "held-out agreement") -> bytes | None:
    """One histogram per baseline of (model - baseline) per participant, with zero marked."""
    diffs = {k: [v for v in vs if v is not None] for k, vs in diffs.items()}
    diffs = {k: v for k, v in diffs.items() if v}
    if not diffs:
        return None
    plt = _plt()
    fig, axes = plt.subplots(1, len(diffs), figsize=(4 * len(diffs), 3), squeeze=False)
    for ax, (name, vals) in zip(axes[0], sorted(diffs.items()), strict=True):
        ax.hist(vals, bins=min(40, max(5, len(vals) // 10)), color="#4a7ab0")
        ax.axvline(0, color="#b03a2e", lw=1)
        mean = sum(vals) / len(vals)
        ax.axvline(mean, color="black", lw=1, ls="--")
        ax.set_title(f"model - {name}\n(n = {len(vals)}, mean {mean:+.3f})", fontsize=9)
        ax.set_xlabel(f"difference in {metric}", fontsize=8)
        ax.set_ylabel("participants", fontsize=8)
    return _png(fig)


def parameter_boxes(params: Mapping[str, Sequence[float]]) -> bytes | None:
    """One box per parameter across participants (horizontal, so names stay readable)."""
    params = {k: [v for v in vs if v is not None] for k, vs in params.items()}
    params = {k: v for k, v in sorted(params.items()) if v}
    if not params:
        return None
    plt = _plt()
    fig, ax = plt.subplots(figsize=(7, 0.4 * len(params) + 1.2))
    ax.boxplot(list(params.values()), orientation="horizontal", showfliers=True, flierprops={"markersize": 2})
    ax.set_yticks(range(1, len(params) + 1), [f"{k} (n={len(v)})" for k, v in params.items()], fontsize=8)
    ax.set_xlabel("fitted value (θ relative to the reference pair; β)", fontsize=8)
    return _png(fig)


def histogram(values: Sequence[float], *, xlabel: str, title: str) -> bytes | None:
    vals = [v for v in values if v is not None]
    if not vals:
        return None
    plt = _plt()
    fig, ax = plt.subplots(figsize=(5, 2.8))
    ax.hist(vals, bins=min(40, max(5, len(vals) // 10)), color="#5b8c5a")
    ax.set_xlabel(xlabel, fontsize=8)
    ax.set_ylabel("participants", fontsize=8)
    ax.set_title(f"{title} (n = {len(vals)})", fontsize=9)
    return _png(fig)
