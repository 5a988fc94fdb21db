"""Codebook IDs: a kind's prefix and a running number, never reused."""

from __future__ import annotations

def next_id(prefix: str, n: int) -> str:
    """``P1``, ``S3``...: the ``n``-th ID of a kind."""
    return f"{prefix}{n}"
