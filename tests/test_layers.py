"""The layering rules of DESIGN.md §2, read from the imports with `ast`."""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parent.parent / "planrunner"


def imported_modules(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(alias.name.split(".")[0] for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level == 0 and node.module:
                names.add(node.module.split(".")[0])
            elif node.level > 0:
                names.add("." * node.level + (node.module or ""))
    return names


def test_engines_are_pure():
    allowed = {"numpy", "scipy", "math", "dataclasses", "typing", "itertools", "hashlib", "functools",
               "collections", "__future__", "planrunner", "operator", "numbers", "enum", "abc"}
    forbidden_names = {"pandas", "pydantic", "yaml", "jinja2", "os", "io", "pathlib", "time", "datetime",
                       "logging", "sys", "subprocess", "random", "open"}
    for path in (PACKAGE / "engines").glob("*.py"):
        for name in imported_modules(path):
            if name.startswith("."):
                assert name in (".", ".statistics", ".streams", ".results", ".bootstrap", ".jackknife",
                                ".permutation", "..errors") or name.lstrip(".") in {
                    p.stem for p in (PACKAGE / "engines").glob("*.py")} or name == "..errors", (path, name)
                continue
            assert name in allowed and name not in forbidden_names, f"{path.name} imports {name}"
        source = path.read_text(encoding="utf-8")
        assert "print(" not in source and "open(" not in source, path.name


def test_schema_imports_only_pydantic():
    names = imported_modules(PACKAGE / "plan" / "schema.py")
    assert names <= {"__future__", "typing", "pydantic"}, names


def test_only_cli_prints():
    for path in PACKAGE.rglob("*.py"):
        if path.parent.name == "cli" or path.name == "__main__.py":
            continue
        tree = ast.parse(path.read_text(encoding="utf-8"))
        calls = [n for n in ast.walk(tree) if isinstance(n, ast.Call) and getattr(n.func, "id", None) == "print"]
        assert not calls, f"{path.name} prints"
