"""HTML and Markdown views of a record.

Templates live in the top-level `templates/` folder (shipped inside the wheel as
`planrunner/templates`). They only format: every number they show is already in the record. The
pictures are inline SVG drawn here from the record's histograms, so a report is one
self-contained file that opens offline and from an e-mail attachment.
"""

from __future__ import annotations

import functools
import importlib.resources
import math
import re
from pathlib import Path
from typing import Any

import jinja2
from markupsafe import Markup, escape


def templates_folder() -> Path:
    """The templates inside an installed wheel, else the repository's top-level folder."""
    packaged = importlib.resources.files("planrunner") / "templates"
    if packaged.is_dir():
        return Path(str(packaged))
    return Path(__file__).resolve().parent.parent / "templates"


@functools.lru_cache(maxsize=None)
def _environment(kind: str) -> jinja2.Environment:
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(templates_folder())),
        autoescape=(kind == "html"),
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )
    env.filters["num"] = number
    env.filters["pvalue"] = pvalue
    env.filters["md"] = markdown_cell
    return env


def number(value: Any, digits: int = 4) -> str:
    """A number to `digits` significant digits; '—' for a missing one."""
    if value is None:
        return "—"
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return str(value)
    if isinstance(value, int):
        return str(value)
    if value == 0:
        return "0"
    return f"{value:.{digits}g}"


def pvalue(value: Any) -> str:
    if value is None:
        return "—"
    return f"{value:.4g}" if value >= 1e-4 else f"{value:.2e}"


def markdown_cell(value: Any) -> str:
    """Text safe inside a Markdown table cell: no pipes, no HTML, no line breaks."""
    text = str(value).replace("\\", "\\\\").replace("|", "\\|").replace("\n", " ")
    return text.replace("<", "&lt;").replace(">", "&gt;")


def histogram_svg(entry: dict[str, Any], width: int = 560, height: int = 180) -> Markup:
    """Bars of the resampling (or null) distribution, the observed value and the first interval."""
    dist = entry.get("distribution") or {}
    hist = dist.get("histogram") or {}
    edges, counts = hist.get("edges") or [], hist.get("counts") or []
    if not counts:
        return Markup("")
    pad_l, pad_r, pad_t, pad_b = 40, 12, 14, 34
    lo, hi = edges[0], edges[-1]
    marks = [(entry.get("estimate"), "observed", "#000000", "")]
    if entry.get("intervals"):
        first = entry["intervals"][0]
        for end in ("lower", "upper"):
            marks.append((first.get(end), f"{first['method']} {end}", "#0072b2", "6 3"))
    for value, *_ in marks:
        if value is not None and math.isfinite(value):
            lo, hi = min(lo, value), max(hi, value)
    span = (hi - lo) or 1.0
    top = max(counts) or 1

    def x(v: float) -> float:
        return pad_l + (v - lo) / span * (width - pad_l - pad_r)

    def y(c: float) -> float:
        return height - pad_b - c / top * (height - pad_t - pad_b)

    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {width} {height}" width="{width}" '
             f'height="{height}" role="img" aria-labelledby="t-{escape(entry["id"])}">',
             f'<title id="t-{escape(entry["id"])}">{escape(dist.get("kind", "distribution"))} of '
             f'{escape(entry["statistic_label"])}, {sum(counts)} values</title>']
    for left, right, c in zip(edges[:-1], edges[1:], counts):
        if c:
            parts.append(f'<rect x="{x(left):.2f}" y="{y(c):.2f}" width="{max(x(right) - x(left) - 0.5, 0.5):.2f}" '
                         f'height="{y(0) - y(c):.2f}" fill="#bbbbbb"/>')
    parts.append(f'<line x1="{pad_l}" y1="{y(0):.2f}" x2="{width - pad_r}" y2="{y(0):.2f}" stroke="#444"/>')
    for value, label, colour, dash in marks:
        if value is None or not math.isfinite(value):
            continue
        dash_attr = f' stroke-dasharray="{dash}"' if dash else ""
        parts.append(f'<line x1="{x(value):.2f}" y1="{pad_t - 4}" x2="{x(value):.2f}" y2="{y(0):.2f}" '
                     f'stroke="{colour}" stroke-width="2"{dash_attr}><title>{escape(label)}: '
                     f'{escape(number(value))}</title></line>')
    for v in (edges[0], (edges[0] + edges[-1]) / 2, edges[-1]):
        parts.append(f'<text x="{x(v):.2f}" y="{height - pad_b + 14}" font-size="11" text-anchor="middle">'
                     f'{escape(number(v, 3))}</text>')
    parts.append(f'<text x="{pad_l}" y="{height - 4}" font-size="11">{escape(entry["statistic_label"])}'
                 f'{" (" + escape(entry["unit"]) + ")" if entry.get("unit") else ""}; solid: observed; '
                 f'dashed: interval</text>')
    parts.append(f'<text x="4" y="{pad_t + 4}" font-size="11">{top}</text>')
    parts.append("</svg>")
    return Markup("".join(parts))


def code_fence(text: str) -> str:
    """A Markdown code fence longer than any run of backticks in `text`, so that a plan holding
    backticks (a quoted column name in a filter, say) cannot close the block early (CommonMark:
    a fence closes only on a run at least as long as the one that opened it)."""
    longest = max((len(run) for run in re.findall(r"`+", text)), default=0)
    return "`" * max(3, longest + 1)


def render(record: dict[str, Any], kind: str) -> str:
    """The report for `kind` ('html' or 'md') as text; a pure function of the record."""
    template = _environment(kind).get_template("report.html.j2" if kind == "html" else "report.md.j2")
    figures = {a["id"]: histogram_svg(a) for a in record["analyses"]} if kind == "html" else {}
    return template.render(record=record, figures=figures, fence=code_fence(record["plan"]["text"]))
