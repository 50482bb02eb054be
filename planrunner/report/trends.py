"""The index of a plan's runs: every run in order and, per analysis, its numbers across runs.

Pure functions of the runs as `planrunner.trail.index` gathers them from the history log and the
records (one dict per run: the history entry's facts, the record's parameters, data hashes, lock
and analyses). The page is one self-contained HTML file (inline SVG pictures, no script, no link)
with the report's style sheet; the Markdown view has the same tables without the pictures.

Each analysis's picture shows, per run, the estimate and its pre-specified interval (the first one
the plan lists) and, when the analysis has p-values, the p-value on a logarithmic scale; a run whose
plan or lock differs from the run before it is drawn with an open marker and a dashed line.
"""

from __future__ import annotations

import math
from typing import Any

from markupsafe import Markup

from planrunner.report import digits as precision
from planrunner.report.labels import interval_name, one_sided


def _number(value: Any) -> float | None:
    if isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value):
        return float(value)
    return None


def _bound(interval: dict[str, Any]) -> float | None:
    """The one end of a one-sided bound (its lower end for a lower bound, upper for an upper one)."""
    return interval["lower"] if interval.get("side") == "lower" else interval["upper"]


def analysis_series(runs: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Per analysis id (in the order first seen): one point per run that has it."""
    series: dict[str, dict[str, Any]] = {}
    for position, run in enumerate(runs):
        for entry in run.get("analyses") or []:
            s = series.setdefault(entry["id"], {"id": entry["id"], "label": entry.get("statistic_label") or "",
                                                "unit": entry.get("unit"), "points": []})
            first = (entry.get("intervals") or [None])[0] or {}
            s["points"].append({"position": position, "seq": run.get("seq"), "run_id": run.get("run_id"),
                                "estimate": _number(entry.get("estimate")),
                                "interval": None if not first else {
                                    "method": interval_name(first.get("method")), "level": first.get("level"),
                                    # a one-sided bound ("lower" / "upper") has its other end open (null)
                                    "side": one_sided(first),
                                    "lower": _number(first.get("lower")), "upper": _number(first.get("upper"))},
                                "p_value": _number(entry.get("p_value")), "changed": run.get("changed", False)})
    return list(series.values())


def _interval_marks(points: list[dict[str, Any]], pen: Any, colour: str) -> list[Any]:
    """Per run its interval as a vertical line, or a one-sided bound as a line from the bound to the
    estimate with a caret pointing to the open side."""
    from planrunner.report.canvas import Line, Marker

    marks: list[Any] = []
    for p in points:
        interval, x = p["interval"], p["position"]
        if interval and interval["lower"] is not None and interval["upper"] is not None:
            marks.append(Line([x, x], [interval["lower"], interval["upper"]], pen, name="interval"))
        elif interval and interval.get("side") and (bound := _bound(interval)) is not None:
            marks.append(Line([x, x], [bound, p["estimate"]], pen, name="interval"))
            marks.append(Line([x], [bound], marker=Marker("^" if interval["side"] == "lower" else "v", 6.0, colour),
                              name="bound"))
    return marks


def _span(values: list[float]) -> tuple[float, float]:
    lo, hi = min(values), max(values)
    pad = (hi - lo) * 0.06 or abs(lo) * 0.1 or 0.5
    return lo - pad, hi + pad


def trend_svg(series: dict[str, Any], runs: list[dict[str, Any]], fmt: Any = precision.significant) -> tuple[str, str]:
    """The picture of one analysis across runs, as SVG text, and its text alternative."""
    from planrunner.report import canvas, plots
    from planrunner.report.canvas import Key, Line, Marker, Pen, Rule

    points = series["points"]
    has_p = any(p["p_value"] is not None for p in points)
    kept = [p for p in points if p["estimate"] is not None]
    method = next((p["interval"]["method"] for p in points if p["interval"]), None)
    style = plots.method_style(next((m for m, s in plots.METHOD_STYLES.items() if s.name == method), method))
    pen = style.pen(1.6)
    black = Pen("#000000", 0.8)
    marks: list[Any] = _interval_marks(kept, pen, style.colour)
    marks.append(Line([q["position"] for q in kept], [q["estimate"] for q in kept], black, name="estimates"))
    for hollow in (False, True):
        chosen = [q for q in kept if q["changed"] == hollow]
        marks.append(Line([q["position"] for q in chosen], [q["estimate"] for q in chosen],
                          marker=Marker("o", 5.0, "#000000", hollow=hollow), name="estimate"))
    keys = [Key("estimate", black, Marker("o", 5.0, "#000000"))]
    if method:
        level = next((p["interval"]["level"] for p in points if p["interval"]), None)
        side = next((p["interval"].get("side") for p in points if p["interval"]), None)
        percent = precision.significant((level or 0) * 100)
        keys.append(Key(f"{method} {percent}% interval" if not side else f"{method}, one-sided {side} {percent}% bound",
                        pen))
    if any(p["changed"] for p in points):
        keys.append(Key("plan or lock changed", marker=Marker("o", 5.0, "#000000", hollow=True)))
    changed = [Rule(p["position"], Pen("#555555", 0.8, (3.2, 2.4)), name="changed") for p in points if p["changed"]]
    drawn = [v for p in kept for v in (p["estimate"], (p["interval"] or {}).get("lower"),
                                       (p["interval"] or {}).get("upper")) if v is not None]
    low, high = _span(drawn or [0.0])
    unit = f" ({series['unit']})" if series.get("unit") else ""
    panels = [canvas.Panel(canvas.value_axis(low, high, f"{series['label']}{unit}", count=6), changed + marks)]
    if has_p:
        with_p = [p for p in points if p["p_value"] is not None and p["p_value"] > 0]
        values = [p["p_value"] for p in with_p] or [1.0]
        p_low = 10.0 ** math.floor(math.log10(min(values)))
        p_high = max(10.0 ** math.ceil(math.log10(max(values))), p_low * 10)
        ticks = canvas.log_ticks(p_low, p_high)
        axis = canvas.Axis(p_low, p_high, ticks, [f"{t:g}".replace("-", "\u2212") for t in ticks],
                           "p-value (log scale)", log=True)
        p_marks: list[Any] = [Line([p["position"] for p in with_p], [p["p_value"] for p in with_p], black,
                                   Marker("s", 4.0, "#000000"), name="p-values")]
        panels.append(canvas.Panel(axis, changed + p_marks))
    x = canvas.Axis(-0.5, len(runs) - 0.5, list(range(len(runs))),
                    [f"#{r.get('seq')}\n{str(r.get('finished_utc') or '')[:10]}" for r in runs],
                    "run (sequence number and date)")
    svg = canvas.Picture(504.0, 331.2 if has_p else 201.6, x, panels, keys).svg()
    said = []
    for p in points:
        interval = p["interval"]
        text = f"run #{p['seq']}: estimate {fmt(p['estimate'])}"
        if interval and interval.get("side") and _bound(interval) is not None:
            text += (f", {interval['method']} one-sided {interval['side']} bound {fmt(_bound(interval))}")
        elif interval and interval["lower"] is not None:
            text += f", {interval['method']} interval {fmt(interval['lower'])} to {fmt(interval['upper'])}"
        if p["p_value"] is not None:
            text += f", p = {fmt(p['p_value'])}"
        if p["changed"]:
            text += " (plan or lock changed)"
        said.append(text)
    alt = (f"{series['id']} across {len(points)} run(s): the estimate as a black dot"
           + (f" with its {method} interval as a vertical line" if method else "")
           + ("; below, the p-value on a log scale" if has_p else "") + ". " + "; ".join(said) + ".")
    return svg, alt


def index_context(runs: list[dict[str, Any]], title: str, *, pictures: bool) -> dict[str, Any]:
    """What the index templates need: the runs, and per analysis its points and (HTML) picture."""
    from planrunner.report import plots
    from planrunner.report.render import _escape_text

    analyses = []
    for k, series in enumerate(analysis_series(runs)):
        view = dict(series)
        if pictures:
            svg, alt = trend_svg(series, runs)
            view["alt"] = alt
            view["inline"] = Markup(plots.inline_svg(plots.Plot(f"trend-{series['id']}", svg, alt),
                                                     f"t{k}-", _escape_text))
        analyses.append(view)
    plan_ids = list(dict.fromkeys(str(r.get("plan_id")) for r in runs if r.get("plan_id")))
    return {"runs": runs, "analyses": analyses, "title": title, "plan_ids": plan_ids}


def render_index(runs: list[dict[str, Any]], title: str, kind: str) -> str:
    """The index page ('html') or document ('md') of a plan's runs."""
    from planrunner.report.render import environment

    template = environment(kind).get_template("index.html.j2" if kind == "html" else "index.md.j2")
    return template.render(**index_context(runs, title, pictures=kind == "html"))
