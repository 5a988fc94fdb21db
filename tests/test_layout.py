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


# The device's side of the boundary: what runs on the participant's machine.
DEVICE_SIDE = ("bundle", "export", "participant", "intake", "vault", "keystore", "codebook", "ledger",
               "episodes", "graph", "caps", "model", "quiz", "uploader", "pause")
# What the device may read of the researcher's package: the documents exchanged with
# the researcher (study card, withdrawal certificate) and the bounded JSON reader.
RESEARCHER_DOCUMENTS = ("agent.study.card", "agent.study.withdrawal", "agent.study.bounded")


def _top(path: Path) -> str:
    return path.relative_to(AGENT).with_suffix("").parts[0]


@pytest.mark.parametrize("path", [p for p in SOURCES if _top(p) in DEVICE_SIDE],
                         ids=lambda p: str(p.relative_to(AGENT)))
def test_device_side_imports_only_exchanged_documents_from_the_researcher_package(path):
    for module, level, names, line in _imports(path):
        target = _resolve(path, module, level)
        if target == "agent" and "study" in names:
            target = "agent.study"
        if target == "agent.study" or target.startswith("agent.study."):
            assert target in RESEARCHER_DOCUMENTS, f"{path.relative_to(AGENT.parent)}:{line} imports {target}"


def test_hpke_suite_table_is_neutral():
    # Both sides import agent.hpke_suites; it imports neither side.
    path = AGENT / "hpke_suites.py"
    for module, level, _names, line in _imports(path):
        target = _resolve(path, module, level)
        for side in ("study",) + DEVICE_SIDE:
            assert not (target == f"agent.{side}" or target.startswith(f"agent.{side}.")), \
                f"hpke_suites.py:{line} imports {target}"


def test_the_rules_see_the_imports_they_forbid(tmp_path):
    # The checks above only mean something if the import reader finds relative imports.
    f = AGENT / "bundle.py"
    found = {_resolve(f, m, lv) for m, lv, _n, _l in _imports(f)}
    assert "agent.hpke_suites" in found and "agent.errors" in found


def test_every_data_file_of_the_package_is_declared_package_data():
    # A non-editable install (pip install ., a wheel) carries only the files that
    # [tool.setuptools.package-data] names; a schema or template missing there works
    # in the editable checkout and fails for an installed user.
    import tomllib
    from pathlib import Path

    root = Path(__file__).resolve().parent.parent
    pkg = root / "agent"
    patterns = tomllib.loads((root / "pyproject.toml").read_text())["tool"]["setuptools"]["package-data"]["agent"]
    declared = {p for pattern in patterns for p in pkg.glob(pattern) if p.is_file()}
    data = {p for p in pkg.rglob("*") if p.is_file() and p.suffix not in (".py", ".pyc")
            and "__pycache__" not in p.parts}
    missing = sorted(str(p.relative_to(root)) for p in data - declared)
    assert not missing, f"not in pyproject.toml [tool.setuptools.package-data]: {missing}"
