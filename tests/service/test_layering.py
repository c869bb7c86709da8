"""Invariants of the code's shape: `training` never imports `service`, and no service module reads the environment
on its own (settings come only through `service.settings`)."""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def _imports(path: Path) -> set[str]:
    names = set()
    for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
        if isinstance(node, ast.Import):
            names |= {a.name for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module:
            names.add(node.module)
    return names


def test_training_never_imports_service():
    files = sorted((ROOT / "training").rglob("*.py"))
    assert files
    offenders = {
        str(f.relative_to(ROOT))
        for f in files
        for name in _imports(f)
        if name.split(".")[:2] == ["knowngood", "service"] or name.split(".")[0] == "service"
    }
    assert not offenders


def test_every_import_goes_through_the_knowngood_namespace():
    """Installed, the packages live under `knowngood.` only (no top-level `training` to clash with other
    projects): an import by the bare folder name would work in the repository and fail once installed."""
    bare = {
        f"{f.relative_to(ROOT)}: {name}"
        for folder in ("training", "service", "demo_parts", "tests")
        for f in sorted((ROOT / folder).rglob("*.py"))
        for name in _imports(f)
        if name.split(".")[0] in ("training", "service", "demo_parts")
    }
    assert not bare


def test_only_settings_reads_the_environment():
    readers = set()
    for path in sorted((ROOT / "service").rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text())):
            attr = node.attr if isinstance(node, ast.Attribute) else None
            if attr in ("environ", "getenv", "environb"):
                readers.add(path.name)
    assert readers == set()  # pydantic-settings reads KNOWNGOOD_* for service/settings.py; nothing does it by hand
