"""The qualification pack as a self-contained HTML page (the JSON document is the source of truth)."""

from __future__ import annotations

from collections.abc import Sequence
from html import escape
from typing import Any


def _cell(value: Any) -> str:
    if value is None:
        return "—"
    if isinstance(value, float):
        return escape(f"{value:.12g}")
    if isinstance(value, (list, tuple)):
        return "<br>".join(escape(str(v)) for v in value) or "—"
    return escape(str(value))


def _table(header: Sequence[str], rows: list[Sequence[Any]], flag: int | None = None) -> str:
    head = "".join(f"<th>{escape(h)}</th>" for h in header)
    body = []
    for row in rows:
        bad = flag is not None and not row[flag]
        cells = "".join(f"<td>{_cell(v)}</td>" for i, v in enumerate(row) if i != flag)
        body.append(f'<tr class="{"fail" if bad else "ok"}">{cells}</tr>')
    head = "".join(f"<th>{escape(h)}</th>" for i, h in enumerate(header) if i != flag)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _verdict(passed: bool) -> str:
    return '<strong class="ok">passed</strong>' if passed else '<strong class="fail">NOT PASSED</strong>'


def render_html(doc: dict[str, Any]) -> str:
    iq, op, trace, summary = doc["installation"], doc["operation"], doc["traceability"], doc["summary"]
    parts = [f"<h1>planrunner {escape(doc['planrunner'])}: qualification</h1>",
             f"<p>Created {escape(doc['created_utc'])}. This page shows <code>qualification.json</code>, whose "
             f"content hash (qualification_sha256) is <code>{escape(doc['qualification_sha256'])}</code>; "
             "check it with <code>planrunner qualify --check</code>.</p>",
             _table(("part", "verdict"), [(k, "passed" if v else "NOT PASSED") for k, v in summary.items()]),
             f"<h2>Installation qualification: {_verdict(iq['passed'])}</h2>",
             f"<p>{escape(iq['note'] or '')} {iq['checked']} file(s) hashed against the wheel's RECORD; "
             f"changed or missing: {_cell(iq['changed_or_missing'])}; not in the RECORD: {_cell(iq['unlisted'])}.</p>",
             _table(("file", "source", "expected", "obtained", "tolerance", "status", "ok"),
                    [(f["path"], f["source"], f["expected"], f["obtained"], f["tolerance"], f["status"],
                      f["status"] in ("matches", "not hashed (RECORD lists no hash)")) for f in iq["files"]], flag=6),
             "<h3>Dependencies</h3>",
             _table(("distribution", "required", "wanted by", "installed", "meets"),
                    [(d["name"], d["required"], d["wanted_by"], d["installed"], d["meets"] is not False)
                     for d in doc["dependencies"]], flag=4),
             "<h3>Platform</h3>", _table(("fact", "value"), list(doc["platform"].items())),
             f"<h2>Operational qualification: {_verdict(op['passed'])}</h2>",
             f"<p>{escape(op['note'] or '')}</p>",
             _table(("case", "kind", "quantity", "source", "expected", "obtained", "tolerance", "error", "passed"),
                    [(c["id"], c["kind"], c["quantity"], c["source"], c["expected"], c["obtained"], c["tolerance"],
                      c.get("error"), c["passed"]) for c in op["cases"]], flag=8),
             f"<h2>Traceability: {_verdict(trace['passed'])}</h2>",
             f"<p>README sections from {escape(trace['readme'])}; each promise and the tests that check it.</p>",
             _table(("README section", "line", "tests", "status", "ok"),
                    [(r["section"], r["line"], r["tests"], r["status"], r["section"] not in trace["gaps"])
                     for r in trace["rows"]], flag=4)]
    style = ("body{font-family:system-ui,sans-serif;margin:2rem;max-width:80rem}table{border-collapse:collapse;"
             "margin:1rem 0}td,th{border:1px solid #bbb;padding:.25rem .5rem;vertical-align:top;text-align:left;"
             "font-size:.85rem;word-break:break-word}tr.fail td{background:#fde2e2}.fail{color:#a40000}"
             ".ok{color:#1d5e20}code{font-size:.85rem}")
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><title>planrunner qualification"
            f"</title><style>{style}</style></head><body>\n" + "\n".join(parts) + "\n</body></html>\n")
