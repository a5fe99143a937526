"""The import rules of design section 3, checked by walking every module's imports (ast)."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1] / "apportion"
_WEB = ("fastapi", "starlette", "apportion.api", "apportion.app")
_PURE = (*_WEB, "pydantic", "sqlalchemy", "apportion.store", "apportion.usecases")
FORBIDDEN = {
    "stats": (*_PURE, "apportion.serving", "apportion.engines"),
    "optimize": (*_PURE, "apportion.serving", "apportion.engines"),
    "engines": (*_WEB, "sqlalchemy", "apportion.store", "apportion.usecases"),
    "serving": _PURE,
    "ingest": (*_WEB, "sqlalchemy", "apportion.store", "apportion.usecases"),
    "store": (*_WEB, "apportion.usecases"),
    "usecases": _WEB,
}


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text())
    out: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            out.add(node.module)
    return out


@pytest.mark.parametrize("package", sorted(FORBIDDEN))
def test_package_imports_respect_layers(package: str) -> None:
    bad = []
    for path in sorted((ROOT / package).rglob("*.py")):
        for name in _imports(path):
            if any(name == f or name.startswith(f + ".") for f in FORBIDDEN[package]):
                bad.append(f"{path.relative_to(ROOT)} imports {name}")
    assert bad == []


def test_sql_only_in_store() -> None:
    bad = []
    for path in sorted(ROOT.rglob("*.py")):
        rel = path.relative_to(ROOT)
        if rel.parts[0] == "store":
            continue
        bad += [
            f"{rel} imports {n}"
            for n in _imports(path)
            if n.startswith("sqlalchemy") or n.startswith("alembic")
        ]
    assert bad == []
