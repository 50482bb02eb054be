"""Packaging: the wheel carries the templates; the README's commands are the ones CI runs."""

from __future__ import annotations

import re
import subprocess
import sys
import zipfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def readme_commands() -> list[str]:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    setup = text.split("## Set-up", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```sh\n(.+?)\n```", setup)


def test_readme_has_exactly_two_setup_commands_and_ci_runs_the_test_one():
    commands = readme_commands()
    assert len(commands) == 2
    demo, tests = commands
    assert "planrunner run plans/" in demo and "pytest" in tests
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8").splitlines()
    assert tests in ci, "the README test command must appear verbatim in .ci/run"
    plan = demo.split("planrunner run ", 1)[1].split()[0]
    assert (ROOT / plan).is_file()


def test_wheel_contains_templates(tmp_path):
    done = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation",
                           "-w", str(tmp_path), str(ROOT)], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr[-2000:]
    wheel = next(tmp_path.glob("planrunner-*.whl"))
    names = zipfile.ZipFile(wheel).namelist()
    for template in (ROOT / "templates").glob("*.j2"):
        assert f"planrunner/templates/{template.name}" in names
    assert "planrunner/engines/bootstrap.py" in names
    entry_points = [n for n in names if n.endswith("entry_points.txt")]
    text = zipfile.ZipFile(wheel).read(entry_points[0]).decode()
    assert "planrunner = planrunner.cli.main:main" in text


def test_templates_found_from_the_source_tree():
    from planrunner.report.render import templates_folder
    assert (templates_folder() / "report.html.j2").is_file()
