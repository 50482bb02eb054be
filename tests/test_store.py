"""The one writer of new files and folders and the one JSON reader (planrunner/trail/store.py).

Locations in the expected messages are counted by hand from the texts written here (line and
column 1-based, as `json.JSONDecodeError` counts them).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from planrunner.errors import OutputError, PlanError, RecordError
from planrunner.trail import store


def test_read_json_names_file_line_and_column(tmp_path: Path):
    broken = tmp_path / "record.json"
    broken.write_text('{\n  "a": 1,\n  "b": tru\n}\n', encoding="utf-8")
    with pytest.raises(RecordError) as caught:
        store.read_json(broken, "record", hint="name another file")
    error = caught.value
    assert error.where == f"{broken}:3:8"  # `tru` starts at column 8 of line 3
    assert error.message.startswith("the record is not valid JSON") and error.hint == "name another file"


def test_read_json_locates_a_byte_that_is_not_utf8(tmp_path: Path):
    broken = tmp_path / "report.json"
    broken.write_bytes(b'{"x": 1,\n "y": "\xff"}\n')
    with pytest.raises(RecordError) as caught:
        store.read_json(broken, "self-check report")
    assert caught.value.where == f"{broken}:2:8" and "0xff" in caught.value.message


def test_read_json_missing_folder_and_chosen_error_class(tmp_path: Path):
    with pytest.raises(RecordError, match="record not found"):
        store.read_json(tmp_path / "absent.json", "record")
    with pytest.raises(RecordError, match="is a folder"):
        store.read_json(tmp_path, "record")
    (tmp_path / "x.json").write_text("[1, 2", encoding="utf-8")
    with pytest.raises(PlanError):
        store.read_json(tmp_path / "x.json", "plan list", error=PlanError)
    (tmp_path / "y.json").write_text('{"k": [1, 2.5, null]}', encoding="utf-8")
    assert store.read_json(tmp_path / "y.json", "record") == {"k": [1, 2.5, None]}


def test_write_new_file_never_replaces_and_leaves_no_staging_copy(tmp_path: Path):
    target = tmp_path / "comparison.md"
    assert store.write_new_file(target, "first\n") == target
    with pytest.raises(OutputError, match="never overwrites"):
        store.write_new_file(target, "second\n")
    with pytest.raises(OutputError, match="already locked"):
        store.write_new_file(target, "third\n", taken="the plan is already locked")
    assert target.read_text(encoding="utf-8") == "first\n"
    assert [p.name for p in tmp_path.iterdir()] == ["comparison.md"]


def test_write_new_file_into_a_missing_folder_is_an_output_error(tmp_path: Path):
    with pytest.raises(OutputError, match="cannot write the report"):
        store.write_new_file(tmp_path / "no-such-folder" / "r.html", "x", what="report")
    assert list(tmp_path.iterdir()) == []


def test_write_new_folder_takes_the_next_free_name(tmp_path: Path):
    first = store.write_new_folder(tmp_path, "run", {"a.json": "{}\n", "figures/f.svg": "<svg/>"})
    second = store.write_new_folder(tmp_path, "run", {"a.json": "[]\n"})
    assert (first.name, second.name) == ("run", "run-2")
    assert json.loads((first / "a.json").read_text(encoding="utf-8")) == {}
    assert (first / "figures" / "f.svg").read_text(encoding="utf-8") == "<svg/>"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run", "run-2"]  # no staging folder left
