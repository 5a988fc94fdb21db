"""Generated blocks in the Markdown docs: the tables made from a contract, between two markers.

``docs/policy.md`` (``python -m agent.audit.schema_doc``) and ``docs/ledger.md``
(``python -m agent.ledger.schema_doc``) each carry one such block; a test per
document fails when the block is stale.
"""

from __future__ import annotations

import sys
from collections.abc import Callable
from pathlib import Path


def splice(document: str, begin: str, end: str, block: str, *, name: str) -> str:
    """``document`` with the text from ``begin`` to ``end`` replaced by ``block`` (which carries both markers)."""
    if begin not in document or end not in document:
        raise ValueError(f"{name} has no generated block markers ({begin!r} ... {end!r})")
    head, rest = document.split(begin, 1)
    _old, tail = rest.split(end, 1)
    return head + block + tail


def main(argv, render: Callable[[], str], splice_doc: Callable[[str], str]) -> int:
    """``--write FILE`` rewrites the block in FILE; no argument prints the block."""
    argv = list(sys.argv[1:] if argv is None else argv)
    if len(argv) == 2 and argv[0] == "--write":
        p = Path(argv[1])
        p.write_text(splice_doc(p.read_text("utf-8")), "utf-8")
        return 0
    sys.stdout.write(render() + "\n")
    return 0
