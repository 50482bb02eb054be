"""Sources stay inside the repository: every citation resolves in docs/VALIDATION.md.

A reviewer must be able to follow each check value to its published source without files that are not
shipped. So no tracked file may cite a brief outside the repository, every case id (`V-...`) and every
`identity N` cited in code and tests must be defined in docs/VALIDATION.md, and every test that file
names must exist.
"""

from __future__ import annotations

import re
import subprocess
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
VALIDATION = ROOT / "docs" / "VALIDATION.md"
TEXT_SUFFIXES = {".py", ".md", ".j2", ".toml", ".yaml", ".yml", ".txt", ".cfg", ".json", ".html", ""}
# spelled in pieces so that this file does not match itself
OUTSIDE = re.compile(r"\b" + "REFER" + r"ENCES\b|\b" + "DESI" + r"GN\b|\.\./" + "shared")
CASE_ID = re.compile(r"(?<![\w-])V-[A-Z0-9]+(?:-[A-Z0-9]+)*")
IDENTITY = re.compile(r"\bidentit(?:y|ies) (\d+)(?:\s*[–-]\s*(\d+))?")


def tracked_files() -> list[Path]:
    """Files under version control (or, outside a git checkout, the files an sdist ships)."""
    try:
        names = subprocess.run(["git", "ls-files"], cwd=ROOT, capture_output=True, text=True, check=True).stdout
        paths = [ROOT / name for name in names.splitlines()]
    except (OSError, subprocess.CalledProcessError):
        skip = {".git", ".venv", "__pycache__", "build", "dist"}
        paths = [p for p in ROOT.rglob("*") if p.is_file() and not skip & set(p.relative_to(ROOT).parts)]
    return [p for p in paths if p.suffix in TEXT_SUFFIXES and p.is_file()]


def texts() -> dict[str, str]:
    found = {}
    for path in tracked_files():
        try:
            found[str(path.relative_to(ROOT))] = path.read_text(encoding="utf-8")
        except UnicodeDecodeError:
            continue
    return found


def defined_case_ids() -> set[str]:
    """Ids defined by a heading (`### V-name: ...`, `## ... (V-name)`) or a bold list entry (`**V-name**`)."""
    text = VALIDATION.read_text(encoding="utf-8")
    ids = set(re.findall(r"^#+ (V-[A-Z0-9-]+[A-Z0-9])", text, flags=re.M))
    ids |= set(re.findall(r"^#+ .*\((V-[A-Z0-9-]+)\)\s*$", text, flags=re.M))
    ids |= set(re.findall(r"\*\*(V-[A-Z0-9-]+)\*\*", text))
    return ids


def defined_identities() -> set[int]:
    section = VALIDATION.read_text(encoding="utf-8").split("## Exact identities", 1)[1].split("\n## ", 1)[0]
    return {int(n) for n in re.findall(r"^(\d+)\. ", section, flags=re.M)}


def test_no_citation_of_files_outside_the_repository():
    offending = [f"{name}:{number}: {line.strip()}"
                 for name, text in texts().items()
                 for number, line in enumerate(text.splitlines(), 1) if OUTSIDE.search(line)]
    assert not offending, "cite the published source or docs/VALIDATION.md instead:\n" + "\n".join(offending)


def test_every_cited_case_id_is_defined():
    defined = defined_case_ids()
    assert {"V-TOL", "V-MOUSE-BOOT", "V-CONV-P", "V-IDENTITY"} <= defined
    missing = sorted({f"{name}: {cid}" for name, text in texts().items()
                      for cid in CASE_ID.findall(text) if cid not in defined})
    assert not missing, "ids cited but not defined in docs/VALIDATION.md:\n" + "\n".join(missing)


def test_every_cited_identity_is_defined():
    defined = defined_identities()
    assert defined == set(range(1, len(defined) + 1)) and len(defined) >= 19
    cited = {(name, k) for name, text in texts().items() for m in IDENTITY.finditer(text)
             for k in range(int(m.group(1)), int(m.group(2) or m.group(1)) + 1)}
    missing = sorted(f"{name}: identity {k}" for name, k in cited if k not in defined)
    assert not missing, "identities cited but not numbered in docs/VALIDATION.md:\n" + "\n".join(missing)


def test_every_test_named_in_the_validation_document_exists():
    # `test_file::test_name` sets the file; a following `::test_name` refers to the same file
    text = VALIDATION.read_text(encoding="utf-8")
    current, missing, seen = None, [], 0
    for file_part, test in re.findall(r"(test_\w+)?::(test_\w+)", text):
        current = file_part or current
        assert current is not None, f"::{test} has no file before it"
        source = ROOT / "tests" / f"{current}.py"
        seen += 1
        if not source.is_file() or not re.search(rf"^def {test}\(", source.read_text(encoding="utf-8"), re.M):
            missing.append(f"{current}::{test}")
    assert seen > 50
    assert not missing, "docs/VALIDATION.md names tests that do not exist:\n" + "\n".join(missing)
