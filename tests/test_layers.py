"""The import allowlist of DEVELOPERS.md ("Layers and import rules"), read from the guide itself
and checked against every module's imports (ast: top-level imports, imports inside functions and
under TYPE_CHECKING alike). A planted violation must fail the same checker."""

from __future__ import annotations

import ast
import re
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
ROOT = REPO / "apportion"
GUIDE = REPO / "DEVELOPERS.md"
NONE = "—"


def read_table(text: str) -> dict[str, tuple[frozenset[str], frozenset[str]]]:
    """unit -> (apportion units it may import, outside top-level packages it may import), from
    the rows between the guide's `layers: begin` and `layers: end` markers. A unit is a package
    (`stats`) or a top-level module without `.py` (`lookup`)."""
    block = text.split("<!-- layers: begin", 1)[1].split("<!-- layers: end", 1)[0]
    rows: dict[str, tuple[frozenset[str], frozenset[str]]] = {}
    for line in block.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) != 3 or not cells[0].startswith("`"):
            continue
        unit = cells[0].strip("`").removesuffix(".py")
        inside, outside = (
            frozenset() if c == NONE else frozenset(n.strip().strip("`") for n in c.split(","))
            for c in cells[1:]
        )
        assert unit not in rows, f"the table lists {unit} twice"
        rows[unit] = (inside, outside)
    assert rows, "no layer table between the markers in DEVELOPERS.md"
    return rows


TABLE = read_table(GUIDE.read_text())


def units(root: Path) -> dict[str, list[Path]]:
    """Every package (a directory with modules) and top-level module under `root`."""
    out: dict[str, list[Path]] = {}
    for path in sorted(root.rglob("*.py")):
        rel = path.relative_to(root)
        unit = rel.parts[0] if len(rel.parts) > 1 else rel.stem
        out.setdefault(unit, []).append(path)
    return out


def imported(path: Path) -> set[str]:
    """Absolute module names a file imports (a relative import is inside its own package)."""
    out: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            if "." in node.module:
                out.add(node.module)
            else:  # `from apportion import lookup`: a module, or a name `__init__` defines
                out.update(f"{node.module}.{a.name}" for a in node.names)
    return out


def violations(
    root: Path, table: dict[str, tuple[frozenset[str], frozenset[str]]], unit: str
) -> list[str]:
    """`file imports name` for each import of `unit` that its row does not allow."""
    inside, outside = table[unit]
    known = units(root)
    bad = []
    for path in known[unit]:
        for name in sorted(imported(path)):
            parts = name.split(".")
            if parts[0] == root.name:
                target = parts[1] if len(parts) > 1 and parts[1] in known else "__init__"
                ok = target == unit or target in inside
            else:
                ok = parts[0] == "__future__" or parts[0] in sys.stdlib_module_names
                ok = ok or parts[0] in outside
            if not ok:
                bad.append(f"{path.relative_to(root.parent)} imports {name}")
    return bad


def test_every_package_has_a_row() -> None:
    missing = sorted(set(units(ROOT)) - set(TABLE))
    assert missing == [], f"add a row to the table in DEVELOPERS.md for {missing}"


@pytest.mark.parametrize("unit", sorted(units(ROOT)))
def test_imports_are_allowed(unit: str) -> None:
    assert violations(ROOT, TABLE, unit) == []


def test_a_planted_violation_fails(tmp_path: Path) -> None:
    """The checker itself: a pure package importing the store, or a web framework, is reported;
    the same package importing only what its row allows is not."""
    pkg = tmp_path / "apportion"
    (pkg / "stats").mkdir(parents=True)
    (pkg / "store").mkdir()
    (pkg / "stats" / "__init__.py").write_text("")
    (pkg / "store" / "__init__.py").write_text("")
    (pkg / "errors.py").write_text("class X(Exception): ...\n")
    (pkg / "stats" / "clean.py").write_text("import numpy as np\nfrom apportion.errors import X\n")
    assert violations(pkg, TABLE, "stats") == []
    (pkg / "stats" / "leak.py").write_text(
        "def f():\n    from apportion.store import audit\n    import fastapi\n"
    )
    assert violations(pkg, TABLE, "stats") == [
        "apportion/stats/leak.py imports apportion.store",
        "apportion/stats/leak.py imports fastapi",
    ]


def test_the_table_keeps_the_guides_promises() -> None:
    """The rules the guide states in words hold for the rows (so widening a row cannot quietly
    break them)."""
    web = {"fastapi", "starlette", "pydantic", "sqlalchemy", "alembic"}
    for pure in ("stats", "optimize"):
        inside, outside = TABLE[pure]
        assert not outside & web and not inside & {"store", "usecases", "api", "app", "engines"}
    assert [u for u, (_, out) in TABLE.items() if out & {"sqlalchemy", "alembic"}] == ["store"]
    assert not TABLE["serving"][0] & {"store", "usecases", "api", "app"}
    assert TABLE["lookup"] == (frozenset(), frozenset())
    assert "store" not in TABLE["api"][0]
    assert [u for u, (inside, _) in TABLE.items() if "api" in inside] == ["app"]
    assert {u for u, (inside, _) in TABLE.items() if "app" in inside} <= {
        "cli",
        "demo",
        "openapi_export",
    }


def test_the_layout_section_names_every_package() -> None:
    """DEVELOPERS.md's layout block lists each package and top-level module."""
    layout = GUIDE.read_text().split("## Layout", 1)[1].split("## ", 1)[0]
    named = set(re.findall(r"^  ([a-z_]+)(?:/|\.py)", layout, flags=re.M))
    missing = sorted(u for u in units(ROOT) if u != "__init__" and u not in named)
    assert missing == []
