"""HTML and Markdown views of a simulation document, and its two pictures (power against the
group size of the search; the coverage of each interval against its nominal level).

Like the run reports they only format: every number is in simulation.json. The pictures are written
by the run reports' SVG writer (report/canvas.py: no ids, no date, text as text), so the same
document gives the same bytes.
"""

from __future__ import annotations

from typing import Any

from markupsafe import escape

from planrunner.report.digits import significant
from planrunner.report.labels import interval_name

FIGURES = "figures"


def percent(value: Any) -> str:
    return "—" if value is None else f"{100.0 * float(value):.1f}%"


def share_text(entry: Any) -> str:
    """'12.3% (95% MC interval 10.1% to 14.8%; 123 of 1000)', or '—'."""
    if not entry or entry.get("rate") is None:
        return "—"
    low, high = entry["interval"]
    return f"{percent(entry['rate'])} ({percent(low)} to {percent(high)}; {entry['count']} of {entry['of']})"


def with_se(entry: Any) -> str:
    if not entry or entry.get("value") is None:
        return "not defined"
    se = entry.get("monte_carlo_se")
    return significant(entry["value"]) + ("" if se is None else f" (MC SE {significant(se)})")


def _coverage_points(document: dict[str, Any]) -> list[tuple[str, float, float, float, float]]:
    """(label, nominal, coverage, low, high) of every interval with a defined coverage."""
    points = []
    for scenario in document["scenarios"]:
        for a in scenario["analyses"]:
            for i in a["intervals"]:
                c = i.get("coverage")
                if c and c.get("rate") is not None:
                    points.append((f"{scenario['name']} · {a['id']} · {interval_name(i['method'])}",
                                   float(i["level"]), float(c["rate"]), float(c["interval"][0]),
                                   float(c["interval"][1])))
    return points


def coverage_plot(document: dict[str, Any]) -> Any:
    """Each interval's simulated coverage with its Monte Carlo interval, beside its nominal level."""
    from planrunner.report import canvas, plots
    from planrunner.report.canvas import Line, Marker, Pen

    points = _coverage_points(document)
    if not points:
        return None
    ys = list(range(len(points)))[::-1]
    marks: list[canvas.Mark] = []
    for y, (_, nominal, rate, low, high) in zip(ys, points):
        marks.append(Line([low, high], [y, y], Pen(plots.BLUE, 1.5), name="mc-interval"))
        marks.append(Line([rate], [y], marker=Marker("o", 5.0, plots.BLUE), name="coverage"))
        marks.append(Line([nominal], [y], marker=Marker("|", 12.0, plots.VERMILLION), name="nominal"))
    reach = [v for p in points for v in p[1:]]
    lo, hi = min(reach), max(reach)
    pad = (hi - lo) * 0.05 or 0.01
    x = canvas.value_axis(lo - pad, hi + pad, "coverage (dot: simulated, bar: 95% Monte Carlo interval, "
                          "tick: nominal level)", count=6)
    rows = canvas.Axis(-0.6, len(points) - 0.4, ys, [p[0] for p in points], label_size=7.0)
    svg = canvas.Picture(504.0, 72.0 * (1.0 + 0.3 * len(points)), x, [canvas.Panel(rows, marks)]).svg()
    alt = "Coverage against nominal level: " + "; ".join(
        f"{label}: {percent(rate)} (nominal {percent(nominal)})" for label, nominal, rate, _, _ in points)
    return plots.Plot("coverage", svg, alt)


def power_plot(search: dict[str, Any] | None) -> Any:
    """The search's power at each group size, with its Monte Carlo interval and the target."""
    from planrunner.report import canvas, plots
    from planrunner.report.canvas import Key, Line, Marker, Pen, Rule, Segments

    drawn = [p for p in (search or {}).get("points", []) if p["power"]["rate"] is not None]
    if not drawn:
        return None
    assert search is not None
    sizes = [p["size"] for p in drawn]
    rates = [p["power"]["rate"] for p in drawn]
    line, dot, bar = Pen(plots.BLUE, 1.5), Marker("o", 5.0, plots.BLUE), Pen(plots.BLUE, 1.0)
    target = Pen(plots.VERMILLION, 1.0, (3.7, 1.6))
    marks: list[canvas.Mark] = [
        Line(sizes, rates, line, dot, name="power"),
        Segments([(n, p["power"]["interval"][0], n, p["power"]["interval"][1]) for n, p in zip(sizes, drawn)], bar,
                 name="mc-interval"),
        Rule(search["target"], target, vertical=False, name="target")]
    keys = [Key("simulated power", line, dot), Key("95% Monte Carlo interval", bar), Key("target", target)]
    pad = (max(sizes) - min(sizes)) * 0.05 or 1.0
    x = canvas.value_axis(min(sizes) - pad, max(sizes) + pad, "rows per group", count=8)
    svg = canvas.Picture(504.0, 216.0, x, [canvas.Panel(canvas.value_axis(0.0, 1.0, "power"), marks)], keys).svg()
    alt = (f"Power of {search['analysis']} under {search['scenario']} against rows per group: "
           + "; ".join(f"n = {n}: {percent(r)}" for n, r in zip(sizes, rates))
           + f"; target {percent(search['target'])}")
    return plots.Plot("power", svg, alt)


def render_simulation(document: dict[str, Any]) -> dict[str, str]:
    """simulation.html, simulation.md and figures/*.svg, by path relative to the folder."""
    from planrunner.report import plots
    from planrunner.report.render import environment

    figures = [p for p in (power_plot(document.get("search")), coverage_plot(document)) if p is not None]
    html_escape = lambda text: str(escape(text))  # noqa: E731
    context = {"doc": document, "figures": [
        {"file": f"{FIGURES}/{p.name}.svg", "alt": p.alt, "svg": plots.inline_svg(p, f"{p.name}-", html_escape)}
        for p in figures]}
    files = {}
    for kind, name in (("html", "simulation.html"), ("md", "simulation.md")):
        env = environment(kind)
        env.filters.setdefault("share", share_text)
        env.filters.setdefault("se", with_se)
        env.filters.setdefault("percent", percent)
        files[name] = env.get_template(f"{name}.j2").render(**context)
    for p in figures:
        files[f"{FIGURES}/{p.name}.svg"] = plots.file_svg(p, html_escape)
    return files
