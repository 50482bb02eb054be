"""Free text in the run history (`--reason`) never splits a line of history.jsonl, and a name
(`--operator`, a signer's name) with a line break or another control character is refused.

Every character some reader takes for the end of a line (each Unicode line-break class that
forces a break: BK, CR, LF, NL, and the separators of Python's str.splitlines) is written as a
JSON escape and read back as itself; the log is read by \\n only.
"""

from __future__ import annotations

import json

import pytest

from planrunner.cli import main as cli
from planrunner.record.canonical import self_hash
from planrunner.trail.history import ENTRY_HASH_FIELD, GENESIS, LINE_BREAKS, entry_line, parse_lines

# (character, its name): Unicode line-break classes LF, CR, BK (VT, FF, LS, PS) and NL (NEL), and the
# information separators U+001C–U+001E that str.splitlines also splits at
BREAKS = [("\n", "LF"), ("\r", "CR"), ("\r\n", "CR LF"), ("\x0b", "VT (BK)"), ("\x0c", "FF (BK)"),
          ("\x1c", "FS"), ("\x1d", "GS"), ("\x1e", "RS"), ("\x85", "NEL (NL)"), ("\u2028", "LS (BK)"),
          ("\u2029", "PS (BK)")]


def test_the_escaped_set_is_every_splitlines_separator():
    # every code point at which str.splitlines ends a line is in LINE_BREAKS, and no other
    splitting = {chr(c) for c in range(0x110000) if len(f"a{chr(c)}b".splitlines()) > 1}
    assert splitting == set(LINE_BREAKS)


def _entry(reason: str, operator: str) -> dict:
    entry = {"format": "planrunner.history/1", "seq": 1, "reason": reason, "operator": operator,
             "previous_sha256": GENESIS}
    entry[ENTRY_HASH_FIELD] = self_hash(entry, ENTRY_HASH_FIELD)
    return entry


@pytest.mark.parametrize("char, name", BREAKS, ids=[name for _, name in BREAKS])
def test_an_entry_with_a_line_break_stays_one_line(char, name):
    entry = _entry(f"re-run{char}after review", f"ana{char}lima")
    line = entry_line(entry)
    assert len(line.splitlines()) == 1 and not any(c in line for c in LINE_BREAKS)
    assert json.loads(line) == entry  # the same value, so the same hash
    entries, problems = parse_lines(line + "\n" + entry_line(entry) + "\n")
    assert problems == [] and [{k: v for k, v in e.items() if k != "_line"} for e in entries] == [entry, entry]


def test_a_log_written_with_raw_separators_is_read_by_newline_only():
    # a log written before line breaks were escaped holds them raw inside its strings
    raw = json.dumps(_entry("a\u2028b\x85c\u2029d", "x"), ensure_ascii=False)
    assert "\u2028" in raw
    entries, problems = parse_lines(raw + "\n")
    assert problems == [] and len(entries) == 1 and entries[0]["reason"] == "a\u2028b\x85c\u2029d"


def test_runs_with_every_line_break_in_the_reason_keep_the_chain(write_plan, tmp_path, capsys):
    from test_faults import DATA, PLAN
    plan = write_plan(PLAN, {"data/d.csv": DATA})
    text = "".join(f"{name}{char}" for char, name in BREAKS)
    out = tmp_path / "out"
    for reason in (f"first {text}", "second"):
        assert cli.main(["run", str(plan), "--out", str(out), "--quiet", "--reason", reason,
                         "--operator", "op"]) == 0
    log = (out / "history.jsonl").read_text(encoding="utf-8")
    assert len(log.splitlines()) == 2  # no reader splits an entry
    capsys.readouterr()
    assert cli.main(["history", str(out)]) == 0
    shown = capsys.readouterr().out
    assert "history chain: intact" in shown and ": 2 run(s)" in shown
    # the table shows the breaks as escapes: no printed line is split, none can be forged
    assert "LF\\u000aCR\\u000d" in shown and "LS (BK)\\u2028" in shown
    assert not any(c in shown.replace("\n", "") for c in LINE_BREAKS)
    first = json.loads(log.splitlines()[0])
    assert first["reason"] == f"first {text}" and first["operator"] == "op"


# every line break above, a tab, a bidirectional override (U+202E) and an isolate (U+2066)
REFUSED = BREAKS + [("\t", "TAB"), ("\u202e", "RLO"), ("\u2066", "LRI")]


@pytest.mark.parametrize("char, name", REFUSED, ids=[name for _, name in REFUSED])
def test_a_name_with_a_control_character_is_refused_before_anything_is_written(write_plan, tmp_path, capsys,
                                                                                char, name):
    from test_faults import DATA, PLAN
    plan = write_plan(PLAN, {"data/d.csv": DATA})
    out = tmp_path / "out"
    capsys.readouterr()
    assert cli.main(["run", str(plan), "--out", str(out), "--operator", f"ana{char}lima"]) == 2
    err = capsys.readouterr().err
    assert f"U+{ord(char[0]):04X}" in err and "at character 4" in err and "--operator" in err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err  # one message, on one line
    assert not out.exists()
    assert cli.main(["lock", str(plan), "--operator", f"ana{char}lima"]) == 2
    assert f"U+{ord(char[0]):04X}" in capsys.readouterr().err
    assert not plan.with_name(plan.name + ".lock.json").exists() and not list(plan.parent.glob("*.lock.json"))
