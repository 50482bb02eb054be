"""Two records side by side: what changed between runs (e.g. last month's extract and this month's).

Pure functions of two record dicts: `compare_records` gathers the differences, and three renderers
show them as a terminal table, Markdown and a self-contained HTML page (the jinja2 template
`compare.html.j2`, with the report's look). Numbers are only formatted here, never recomputed.
"""

from __future__ import annotations

import re
from typing import Any

from planrunner.errors import PlanError
from planrunner.plan.yamlsafe import load_yaml
from planrunner.record.canonical import differences
from planrunner.record.rehearsal import STAMP, is_rehearsal
from planrunner.report import labels
from planrunner.report.labels import interval_name
from planrunner.report.render import number, pvalue


def _interval(a: dict[str, Any] | None, method: str) -> str:
    if a is None:
        return ""
    for i in a.get("intervals") or []:
        if i["method"] == method:
            return labels.interval_ends(i, number(i["lower"]), number(i["upper"]))
    return ""


def _change(x: Any, y: Any) -> float | None:
    numbers = (int, float)
    if isinstance(x, numbers) and isinstance(y, numbers) and not isinstance(x, bool) and not isinstance(y, bool):
        return float(y) - float(x)
    return None


def _adjusted(x: dict[str, Any] | None, y: dict[str, Any] | None) -> list[dict[str, Any]]:
    """Adjusted p-values of both runs, matched by adjustment method."""
    a = {p["method"]: p["p_value"] for p in (x or {}).get("adjusted_p_values") or []}
    b = {p["method"]: p["p_value"] for p in (y or {}).get("adjusted_p_values") or []}
    return [{"method": m, "a": a.get(m), "b": b.get(m), "change": _change(a.get(m), b.get(m))}
            for m in list(a) + [m for m in b if m not in a]]


def _parsed_plan(record: dict[str, Any], label: str) -> Any:
    try:
        return load_yaml(record["plan"]["text"], f"record {label}").data
    except PlanError:
        return None


def compare_records(a: dict[str, Any], b: dict[str, Any]) -> dict[str, Any]:
    """Everything that differs between records A and B, and the numbers of every analysis."""
    plan_a, plan_b = _parsed_plan(a, "A"), _parsed_plan(b, "B")
    plan_changes = [{"path": d.path, "a": d.before, "b": d.after} for d in differences(plan_a, plan_b)]
    env_changes = [{"path": d.path, "a": d.before, "b": d.after}
                   for d in differences(a.get("environment", {}), b.get("environment", {}))]
    param_changes = [{"path": d.path, "a": d.before, "b": d.after}
                     for d in differences(a.get("parameters") or {}, b.get("parameters") or {})]
    ds_a = {d["name"]: d for d in a["datasets"]}
    ds_b = {d["name"]: d for d in b["datasets"]}
    datasets = []
    for name in list(ds_a) + [n for n in ds_b if n not in ds_a]:
        x, y = ds_a.get(name), ds_b.get(name)
        datasets.append({
            "name": name,
            "file": [x and x["file"], y and y["file"]],
            "sha256": [x and x["sha256"], y and y["sha256"]],
            "same_bytes": bool(x and y and x["sha256"] == y["sha256"]),
            "rows_read": [x and x["rows_read"], y and y["rows_read"]],
            "rows_used": [x and x["rows_used"], y and y["rows_used"]],
        })
    an_a = {r["id"]: r for r in a["analyses"]}
    an_b = {r["id"]: r for r in b["analyses"]}
    analyses = []
    for aid in list(an_a) + [i for i in an_b if i not in an_a]:
        x, y = an_a.get(aid), an_b.get(aid)
        methods = []
        for side in (x, y):
            for i in (side or {}).get("intervals") or []:
                if i["method"] not in methods:
                    methods.append(i["method"])
        analyses.append({
            "id": aid,
            "in": "both" if x and y else ("A only" if x else "B only"),
            "method": (x or y or {})["method"],
            "estimate": [x and x["estimate"], y and y["estimate"]],
            "estimate_change": _change(x and x["estimate"], y and y["estimate"]),
            "intervals": [{"method": m, "a": _interval(x, m), "b": _interval(y, m)} for m in methods],
            "p_value": [x and x["p_value"], y and y["p_value"]],
            "p_value_change": _change(x and x["p_value"], y and y["p_value"]),
            "adjusted": _adjusted(x, y),
            "n": [x and x["n"]["groups"], y and y["n"]["groups"]],
            "settings_changed": bool(x and y and x.get("settings") != y.get("settings")),
        })
    return {
        "runs": [{"run_id": r["run_id"], "finished_utc": r["finished_utc"], "operator": r["operator"],
                  "plan_id": r["plan"]["id"], "plan_sha256": r["plan"]["sha256"],
                  "parameters": r.get("parameters") or {}} for r in (a, b)],
        "plan_same_bytes": a["plan"]["sha256"] == b["plan"]["sha256"],
        "plan_changes": plan_changes,
        "parameter_changes": param_changes,
        "environment_changes": env_changes,
        "datasets": datasets,
        "analyses": analyses,
        "rehearsal": rehearsal_warning(a, b),
    }


def rehearsal_warning(a: dict[str, Any], b: dict[str, Any]) -> str | None:
    """The sentence every view of a comparison opens with when either record is a rehearsal's."""
    sides = [label for label, record in (("A", a), ("B", b)) if is_rehearsal(record)]
    if not sides:
        return None
    which = "both records are rehearsals" if len(sides) == 2 else f"record {sides[0]} is a rehearsal"
    return (f"{STAMP}: {which} (planrunner rehearse, dummy data made from the plan's declarations); its numbers, "
            "and every change computed from them, are not results")


def _signed(x: float | None, p: bool = False) -> str:
    if x is None:
        return ""
    if x == 0:
        return "0"
    return ("+" if x > 0 else "") + (f"{x:.4g}" if p else number(x))


def _pair(values: list[Any], fmt=number) -> list[str]:
    return [fmt(v) if v is not None else "—" for v in values]


def _sections(c: dict[str, Any]) -> list[tuple[str, list[str], list[list[str]]]]:
    """(heading, header, rows) for every table; shared by the three renderers."""
    ra, rb = c["runs"]
    out = [("Runs", ["", "A", "B"], [
        ["run id", ra["run_id"], rb["run_id"]],
        ["finished (UTC)", ra["finished_utc"], rb["finished_utc"]],
        ["operator", ra["operator"], rb["operator"]],
        ["plan", ra["plan_id"], rb["plan_id"]],
        ["plan SHA-256", ra["plan_sha256"][:16], rb["plan_sha256"][:16]],
        ["parameters", ", ".join(f"{k}={v}" for k, v in ra["parameters"].items()) or "—",
         ", ".join(f"{k}={v}" for k, v in rb["parameters"].items()) or "—"],
    ])]
    rows = []
    for x in c["analyses"]:
        rows.append([x["id"], x["in"], *_pair(x["estimate"]), _signed(x["estimate_change"]),
                     *_pair(x["p_value"], pvalue), _signed(x["p_value_change"], p=True)])
    out.append(("Estimates and p-values", ["analysis", "in", "estimate A", "estimate B", "change",
                                           "p-value A", "p-value B", "change"], rows))
    rows = [[x["id"], p["method"], *_pair([p["a"], p["b"]], pvalue), _signed(p["change"], p=True)]
            for x in c["analyses"] for p in x["adjusted"]]
    if rows:
        out.append(("Adjusted p-values", ["analysis", "adjustment", "A", "B", "change"], rows))
    rows = [[x["id"], interval_name(i["method"]), i["a"] or "—", i["b"] or "—"] for x in c["analyses"]
            for i in x["intervals"]]
    if rows:
        out.append(("Intervals", ["analysis", "method", "A", "B"], rows))
    rows = []
    for d in c["datasets"]:
        rows.append([d["name"], " / ".join(str(f) for f in d["file"]), "same" if d["same_bytes"] else "changed",
                     *[str(v) if v is not None else "—" for v in d["rows_read"]],
                     *[str(v) if v is not None else "—" for v in d["rows_used"]],
                     (d["sha256"][0] or "—")[:12], (d["sha256"][1] or "—")[:12]])
    out.append(("Data", ["dataset", "file (A / B)", "contents", "rows read A", "rows read B", "rows used A",
                         "rows used B", "SHA-256 A", "SHA-256 B"], rows))
    plan_rows = [[p["path"], _short(p["a"]), _short(p["b"])] for p in c["plan_changes"]]
    if not plan_rows:
        plan_rows = [["(none)", "same bytes" if c["plan_same_bytes"] else "same content, other layout", ""]]
    out.append(("Plan differences", ["path", "A", "B"], plan_rows))
    env_rows = [[p["path"], _short(p["a"]), _short(p["b"])] for p in c["environment_changes"]] or [["(none)", "", ""]]
    out.append(("Environment differences", ["field", "A", "B"], env_rows))
    return out


def _short(value: Any, width: int = 48) -> str:
    text = "—" if value is None else str(value)
    return text if len(text) <= width else text[: width - 1] + "…"


def render_text(c: dict[str, Any]) -> str:
    blocks = []
    for heading, header, rows in _sections(c):
        table = [header] + rows
        widths = [max(len(r[i]) for r in table) for i in range(len(header))]
        lines = ["  ".join(cell.ljust(w) for cell, w in zip(r, widths)).rstrip() for r in table]
        lines.insert(1, "  ".join("-" * w for w in widths))
        blocks.append(f"{heading}\n" + "\n".join(lines))
    warning = c.get("rehearsal")
    if warning:  # first and last, so that neither end of a long listing hides it
        blocks = [f"*** {warning} ***", *blocks, f"*** {STAMP} ***"]
    return "\n\n".join(blocks) + "\n"


def _md(cell: str) -> str:
    return cell.replace("|", "\\|").replace("\n", " ")


def render_markdown(c: dict[str, Any]) -> str:
    ra, rb = c["runs"]
    parts = [f"# Comparison of two runs\n\nA: `{ra['run_id']}` ({ra['finished_utc']}); "
             f"B: `{rb['run_id']}` ({rb['finished_utc']}). Changes are B minus A.\n"]
    if c.get("rehearsal"):
        parts.insert(0, f"> **{_md(c['rehearsal'])}**\n")
    for heading, header, rows in _sections(c):
        lines = ["| " + " | ".join(_md(h) for h in header) + " |", "|" + "---|" * len(header)]
        lines += ["| " + " | ".join(_md(cell) for cell in r) + " |" for r in rows]
        parts.append(f"## {heading}\n\n" + "\n".join(lines) + "\n")
    if c.get("rehearsal"):
        parts.append(f"**{STAMP}.**\n")
    return "\n".join(parts)


# columns that hold numbers (right-aligned) or hashes (monospace) in the HTML page, by heading
_NUMERIC = {"Estimates and p-values": {2, 3, 4, 5, 6, 7}, "Adjusted p-values": {2, 3, 4},
            "Data": {3, 4, 5, 6}}
_HASHES = {"Runs": set(), "Data": {7, 8}}


def _anchor(heading: str) -> str:
    return "s-" + re.sub(r"[^a-z0-9]+", "-", heading.lower()).strip("-")


def render_html(c: dict[str, Any]) -> str:
    """The comparison as one self-contained page (no script, no link, no network), from the
    template `compare.html.j2`; every text is escaped by the template."""
    from planrunner.report.render import environment

    sections = []
    for heading, header, rows in _sections(c):
        numeric, hashes = _NUMERIC.get(heading, set()), _HASHES.get(heading, set())
        sections.append({"heading": heading, "anchor": _anchor(heading), "header": header, "rows": rows,
                         "numeric": [k in numeric for k in range(len(header))],
                         "hashes": [k in hashes for k in range(len(header))]})
    template = environment("html").get_template("compare.html.j2")
    return template.render(runs=c["runs"], sections=sections, plan_same_bytes=c["plan_same_bytes"],
                           plan_changes=c["plan_changes"], rehearsal=c.get("rehearsal"), stamp=STAMP)
