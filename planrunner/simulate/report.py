"""HTML and Markdown views of a simulation document, and its two pictures (power against the
group size of the search; the coverage of each interval against its nominal level).

Like the run reports they only format: every number is in simulation.json. The pictures are drawn
by matplotlib with the run reports' settings (report/plots.py: fixed hash salt, no date, text as
text), so the same document gives the same bytes.
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
    from planrunner.report import plots

    points = _coverage_points(document)
    if not points:
        return None
    fig, ax = plots._figure()
    ys = list(range(len(points)))[::-1]
    for y, (_, nominal, rate, low, high) in zip(ys, points):
        ax.plot([low, high], [y, y], color=plots.BLUE, linewidth=1.5)
        ax.plot([rate], [y], marker="o", color=plots.BLUE, linestyle="none")
        ax.plot([nominal], [y], marker="|", markersize=12, color=plots.VERMILLION, linestyle="none")
    ax.set_yticks(ys, [p[0] for p in points], fontsize=7)
    ax.set_xlabel("coverage (dot: simulated, bar: 95% Monte Carlo interval, tick: nominal level)")
    fig.set_size_inches(7.0, 1.0 + 0.3 * len(points))
    plots.fit_margins(ax, 1)  # room for the long tick labels (the figures have no layout engine)
    alt = "Coverage against nominal level: " + "; ".join(
        f"{label}: {percent(rate)} (nominal {percent(nominal)})" for label, nominal, rate, _, _ in points)
    return plots.Plot("coverage", plots._svg(fig), alt)


def power_plot(search: dict[str, Any] | None) -> Any:
    """The search's power at each group size, with its Monte Carlo interval and the target."""
    from planrunner.report import plots

    drawn = [p for p in (search or {}).get("points", []) if p["power"]["rate"] is not None]
    if not drawn:
        return None
    assert search is not None
    fig, ax = plots._figure()
    sizes = [p["size"] for p in drawn]
    rates = [p["power"]["rate"] for p in drawn]
    ax.plot(sizes, rates, marker="o", color=plots.BLUE, label="simulated power")
    ax.vlines(sizes, [p["power"]["interval"][0] for p in drawn], [p["power"]["interval"][1] for p in drawn],
              color=plots.BLUE, linewidth=1.0, label="95% Monte Carlo interval")
    ax.axhline(search["target"], color=plots.VERMILLION, linestyle="--", linewidth=1.0, label="target")
    ax.set_xlabel("rows per group")
    ax.set_ylabel("power")
    ax.set_ylim(0.0, 1.0)
    plots._legend(ax)
    alt = (f"Power of {search['analysis']} under {search['scenario']} against rows per group: "
           + "; ".join(f"n = {n}: {percent(r)}" for n, r in zip(sizes, rates))
           + f"; target {percent(search['target'])}")
    return plots.Plot("power", plots._svg(fig), alt)


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
