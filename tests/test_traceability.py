"""The traceability matrix: every README section is traced to tests that exist, or says why it makes
no promise."""

from __future__ import annotations

import ast
from pathlib import Path

from planrunner.audit.trace import NO_PROMISE, TRACE, readme_sections

ROOT = Path(__file__).resolve().parent.parent


def existing_tests() -> set[str]:
    names = set()
    for file in (ROOT / "tests").glob("test_*.py"):
        tree = ast.parse(file.read_text(encoding="utf-8"))
        names |= {f"tests/{file.name}::{node.name}" for node in tree.body
                  if isinstance(node, ast.FunctionDef) and node.name.startswith("test_")}
    return names


def test_every_readme_section_is_traced_or_makes_no_promise():
    headings = [h for h, _ in readme_sections((ROOT / "README.md").read_text(encoding="utf-8"))]
    assert len(headings) == len(set(headings)), "two README sections share a heading"
    untraced = [h for h in headings if not TRACE.get(h) and h not in NO_PROMISE]
    assert not untraced, f"add these README sections to planrunner/audit/trace.py: {untraced}"
    stale = [h for h in list(TRACE) + list(NO_PROMISE) if h not in headings]
    assert not stale, f"no longer README sections: {stale}"
    assert not set(TRACE) & set(NO_PROMISE)


def test_every_traced_test_exists():
    present = existing_tests()
    missing = sorted({t for tests in TRACE.values() for t in tests} - present)
    assert not missing, f"traced tests that do not exist: {missing}"


def test_headings_in_code_blocks_are_not_sections():
    text = "# a\n```sh\n# not a heading\n```\n## b\n#### too deep\n"
    assert readme_sections(text) == [("a", 1), ("b", 5)]
