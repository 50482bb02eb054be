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


def trend_svg(series: dict[str, Any], runs: list[dict[str, Any]], fmt: Any = precision.significant) -> tuple[str, str]:
    """The picture of one analysis across runs, as SVG text, and its text alternative."""
    import matplotlib
    from matplotlib.figure import Figure
    from matplotlib.ticker import LogLocator, NullFormatter

    from planrunner.report import plots

    points = series["points"]
    has_p = any(p["p_value"] is not None for p in points)
    with matplotlib.rc_context(plots.RC):
        # fixed margins instead of a layout engine: an index holds a picture per analysis and is drawn
        # after every run, and the constrained layout drew each figure twice
        height = 4.6 if has_p else 2.8
        fig = Figure(figsize=(7.0, height))
        fig.subplots_adjust(left=0.13, right=0.98, top=1 - 0.42 / height, bottom=0.72 / height, hspace=0.12)
        axes = fig.subplots(2, 1, sharex=True) if has_p else [fig.add_subplot()]
        ax = axes[0]
        kept = [p for p in points if p["estimate"] is not None]
        method = next((p["interval"]["method"] for p in points if p["interval"]), None)
        style = plots.method_style(next((m for m, s in plots.METHOD_STYLES.items() if s.name == method), method))
        for p in kept:
            marker_face = "white" if p["changed"] else "black"
            interval = p["interval"]
            if interval and interval["lower"] is not None and interval["upper"] is not None:
                ax.plot([p["position"], p["position"]], [interval["lower"], interval["upper"]], color=style.colour,
                        linestyle=style.line, linewidth=1.6)
            elif interval and interval.get("side") and (bound := _bound(interval)) is not None:
                # a one-sided bound: a line from the bound to the estimate, a caret pointing to the open side
                ax.plot([p["position"], p["position"]], [bound, p["estimate"]], color=style.colour,
                        linestyle=style.line, linewidth=1.6)
                ax.plot([p["position"]], [bound], marker="^" if interval["side"] == "lower" else "v",
                        markersize=6, color=style.colour, linestyle="none")
            ax.plot([p["position"]], [p["estimate"]], marker="o", markersize=5, color="black",
                    markerfacecolor=marker_face, linestyle="none")
        ax.plot([q["position"] for q in kept], [q["estimate"] for q in kept], color="black", linewidth=0.8)
        ax.plot([], [], marker="o", color="black", linestyle="-", linewidth=0.8, label="estimate")
        if method:
            level = next((p["interval"]["level"] for p in points if p["interval"]), None)
            side = next((p["interval"].get("side") for p in points if p["interval"]), None)
            percent = precision.significant((level or 0) * 100)
            name = f"{method} {percent}% interval" if not side else f"{method}, one-sided {side} {percent}% bound"
            ax.plot([], [], color=style.colour, linestyle=style.line, linewidth=1.6, label=name)
        if any(p["changed"] for p in points):
            ax.plot([], [], marker="o", markerfacecolor="white", color="black", linestyle="none",
                    label="plan or lock changed")
        for p in points:
            if p["changed"]:
                for a in axes:
                    a.axvline(p["position"], color="#555555", linewidth=0.8, linestyle=(0, (4, 3)))
        ax.set_ylabel(f"{series['label']}" + (f" ({series['unit']})" if series.get("unit") else ""))
        ax.yaxis.set_major_formatter(plots.PlainTicks())
        ax.legend(loc="lower left", bbox_to_anchor=(0.0, 1.0), ncol=3, frameon=False, fontsize=8, borderaxespad=0.2)
        if has_p:
            pax = axes[1]
            with_p = [p for p in points if p["p_value"] is not None and p["p_value"] > 0]
            pax.plot([p["position"] for p in with_p], [p["p_value"] for p in with_p], marker="s", markersize=4,
                     color="black", linewidth=0.8)
            pax.set_yscale("log")
            pax.yaxis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
            pax.yaxis.set_major_formatter(plots.PlainTicks())  # no mathtext: it is switched off
            pax.yaxis.set_minor_formatter(NullFormatter())
            pax.set_ylabel("p-value (log scale)")
        axes[-1].set_xticks(range(len(runs)), [f"#{r.get('seq')}\n{str(r.get('finished_utc') or '')[:10]}"
                                                for r in runs])
        axes[-1].set_xlim(-0.5, len(runs) - 0.5)
        axes[-1].set_xlabel("run (sequence number and date)")
    svg = plots._svg(fig)
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
