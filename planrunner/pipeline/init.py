"""`planrunner init DATAFILE`: a plan skeleton written from a data file's columns.

The skeleton declares one dataset with every column typed from the file (category levels listed)
and one placeholder analysis, with comments saying what to choose. It says nothing about the
outcome values (no means, no ranges, no counts): the plan is written blind. It passes
`planrunner check --plan-only` as written; a new file is created, never an existing one replaced.
"""

from __future__ import annotations

import json
import re
import secrets
from pathlib import Path

from planrunner.data.formats import FORMAT_WORDS
from planrunner.data.infer import Inferred, infer_columns
from planrunner.data.tables import read_regular_file
from planrunner.errors import DataError
from planrunner.plan.schema import DATA_SUFFIXES
from planrunner.trail.store import write_new_file

_PLAIN = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_RESERVED = {"true", "false", "yes", "no", "on", "off", "null", "y", "n"}


def _yaml(text: str) -> str:
    """A YAML scalar for a name or a level: plain when it is safe, else double-quoted (JSON rules)."""
    if _PLAIN.fullmatch(text) and text.lower() not in _RESERVED:
        return text
    return json.dumps(text, ensure_ascii=False)


def _plan_id(stem: str) -> str:
    ident = re.sub(r"[^A-Za-z0-9_.-]+", "-", stem).strip("-._")[:64]
    return ident or "plan"


def _column_line(column: Inferred) -> str:
    parts = [f"type: {column.type}"]
    if column.levels is not None:
        parts.append("levels: [" + ", ".join(_yaml(level) for level in column.levels) + "]")
    comment = f"  # {column.label}" if column.label else ""
    return f"      {_yaml(column.name)}: {{{', '.join(parts)}}}{comment}"


def skeleton(data_file: Path, plan_folder: Path, *, sheet: str | None = None, fmt: str | None = None) -> str:
    """The text of a plan skeleton for `data_file` (its path written relative to `plan_folder`)."""
    shown = str(data_file)
    data = read_regular_file(data_file, shown, "the DATAFILE argument")
    fmt = fmt or DATA_SUFFIXES.get(data_file.suffix.lower(), "csv")
    columns = infer_columns(data, fmt, shown, sheet)
    outcomes = [c for c in columns if c.type in ("number", "integer")]
    if not outcomes:
        raise DataError("no column holds numbers, so there is nothing a skeleton analysis could use as its outcome",
                        where=shown, hint="check the file (and its delimiter), or write the plan by hand")
    try:
        relative = data_file.resolve().relative_to(plan_folder.resolve()).as_posix()
    except ValueError:
        raise DataError("the data file is not inside the plan's folder", where=shown,
                        hint="write the plan with --out into the data file's folder or a folder above it") from None
    # a grouping suggestion: a category with two levels first (a comparison of two groups)
    groups = sorted((c for c in columns if c.type == "category" and c.levels is not None and len(c.levels) >= 2),
                    key=lambda c: len(c.levels or ()) != 2)
    missing = any(c.missing for c in columns)
    lines = [
        f"# Plan skeleton written by 'planrunner init' from {data_file.name}.",
        "# Every column is typed from the file; nothing about the values was looked at beyond their",
        "# kind (no means, no ranges): choose the analyses before anyone looks at the outcomes.",
        f"plan: {_plan_id(data_file.stem)}",
        f"title: {json.dumps('Analyses of ' + data_file.name, ensure_ascii=False)}  # say what is studied",
        f"seed: {secrets.randbelow(2**31)}  # drawn when this skeleton was written; keep it once the plan is locked",
        "",
        "datasets:",
        "  data:",
        f"    file: {_yaml(relative)}",
    ]
    if fmt not in ("csv", "tsv") or data_file.suffix.lower() not in (".csv", ".tsv", ".tab"):
        lines.append(f"    format: {fmt}  # {FORMAT_WORDS.get(fmt, fmt.upper())}")
    if sheet is not None:
        lines.append(f"    sheet: {_yaml(sheet)}")
    lines += ["    columns:", *(_column_line(c) for c in columns)]
    if missing:
        lines.append("    missing: drop  # some columns have missing values: drop those rows (or refuse them)")
    lines += [
        "    # rows_where: \"...\"  # rows every analysis uses (a condition in the filter language)",
        "    # sets: {full: \"...\", per_protocol: \"...\"}  # analysis sets, chosen per analysis with set:",
        "",
        "analyses:",
        "  # A placeholder: choose the outcome, the statistic, the method and the design.",
        "  - id: primary",
        "    role: primary",
        "    data: data",
        f"    outcome: {_yaml(outcomes[0].name)}  # numeric columns: "
        + ", ".join(c.name for c in outcomes[:8]) + (" ..." if len(outcomes) > 8 else ""),
    ]
    if groups:
        by, levels = groups[0], groups[0].levels or ()
        lines += [f"    # groups: {{by: {_yaml(by.name)}, compare: [{', '.join(_yaml(v) for v in levels[:2])}]}}"
                  "  # two levels: first minus second",
                  "    statistic: mean  # with groups: mean_difference, median_difference, t_welch, ..."]
    else:
        lines.append("    statistic: mean  # median, trimmed_mean (with trim:), sd, ...")
    lines += [
        "    method: bootstrap  # or permutation (with groups), jackknife",
        "    intervals: [percentile, bca]",
        "    # resamples: 9999",
    ]
    return "\n".join(lines) + "\n"


def write_skeleton(data_file: str | Path, out: str | Path | None = None, *, sheet: str | None = None,
                   fmt: str | None = None) -> Path:
    """Write the skeleton to `out` (default: plan.yaml beside the data file); never over a file."""
    data_path = Path(data_file)
    target = Path(out) if out is not None else data_path.with_name("plan.yaml")
    text = skeleton(data_path, target.parent, sheet=sheet, fmt=fmt)
    return write_new_file(target, text, what="plan", hint="name a new file with --out")
