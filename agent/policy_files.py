"""The policies shipped with lethe, as package data: list them, write one out for editing.

``agent/data/policies/`` is the one copy: it is package data, so an installed
lethe (editable or not) has the files wherever it runs, and the repository's
``policies/`` is a symbolic link to it.  ``lethe policy list`` and ``lethe policy write
NAME FILE`` are the commands.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

from .errors import DataError, UsageError

DATA = Path(__file__).resolve().parent / "data" / "policies"


def shipped() -> dict[str, Path]:
    """``{name: path}`` of every shipped file (``default``, ``strict``, ``board-limits.example``)."""
    return {p.name[:-len(".toml")]: p for p in sorted(DATA.glob("*.toml"))}


def describe(path: Path) -> str:
    """One line: a policy's name and version, or what a board limits file is."""
    try:
        doc = tomllib.loads(path.read_text("utf-8"))
    except (OSError, tomllib.TOMLDecodeError) as e:
        raise DataError(f"{path}: shipped file unreadable ({e})") from None
    pol = doc.get("policy")
    if isinstance(pol, dict):
        return f"study policy {pol.get('name')} {pol.get('version')} (study {doc.get('study', {}).get('study_id')})"
    return "ethics board limits (for 'lethe audit policy --limits')"


def write_shipped(name: str, out, *, force: bool = False) -> Path:
    """Copy shipped file ``name`` to ``out`` for editing; refuses to overwrite unless ``force``."""
    files = shipped()
    if name not in files:
        raise UsageError(f"no shipped policy {name!r}; 'lethe policy list' shows {', '.join(files)}")
    out = Path(out)
    if out.exists() and not force:
        raise UsageError(f"{out} already exists; choose another name or pass --force to overwrite it")
    if out.parent and not out.parent.exists():
        raise UsageError(f"{out.parent}: no such folder")
    out.write_bytes(files[name].read_bytes())
    return out
