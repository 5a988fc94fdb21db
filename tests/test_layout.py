"""The layout rules of docs/architecture.md, checked on the source (ast)."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

AGENT = Path(__file__).resolve().parent.parent / "agent"
DEVICE_INTERNALS = ("intake", "vault", "keystore", "codebook")


def _imports(path: Path):
    """(module as written, level, names) of every ``from X import ...`` in ``path``."""
    tree = ast.parse(path.read_text("utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            yield node.module or "", node.level, [a.name for a in node.names], node.lineno
        elif isinstance(node, ast.Import):
            for a in node.names:
                yield a.name, 0, [], node.lineno


def _resolve(path: Path, module: str, level: int) -> str:
    """Absolute dotted module of a (possibly relative) import in ``path``."""
    if level == 0:
        return module
    parts = list(path.relative_to(AGENT.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    base = parts[: len(parts) - level + (1 if path.name == "__init__.py" else 0)]
    return ".".join(base + ([module] if module else []))


SOURCES = sorted(AGENT.rglob("*.py"))


def test_no_private_names_imported_across_modules():
    bad = []
    for path in SOURCES:
        for module, _level, names, line in _imports(path):
            for n in names:
                if n.startswith("_") and not n.startswith("__"):
                    bad.append(f"{path.relative_to(AGENT.parent)}:{line} imports {n} from {module or '.'}")
    assert bad == []


@pytest.mark.parametrize("path", [p for p in SOURCES if "study" in p.relative_to(AGENT).parts[:1]],
                         ids=lambda p: str(p.relative_to(AGENT)))
def test_researcher_side_imports_no_device_internals(path):
    for module, level, _names, line in _imports(path):
        target = _resolve(path, module, level)
        for internal in DEVICE_INTERNALS:
            assert not (target == f"agent.{internal}" or target.startswith(f"agent.{internal}.")), \
                f"{path.relative_to(AGENT.parent)}:{line} imports {target}"
