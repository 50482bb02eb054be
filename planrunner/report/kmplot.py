"""The Kaplan–Meier curves of a censored analysis, one step line per group with its censoring marks,
drawn from the record's ``details.kaplan_meier`` alone (every point drawn is a number stored there).

Kept apart from ``plots`` (the resampling pictures) and sharing its settings: matplotlib's SVG
with a fixed hash salt and no date, the Okabe–Ito colours, each group also told apart by its line
style and marker, so a greyscale print keeps them apart.
"""

from __future__ import annotations

import io
from typing import Any

import matplotlib
from matplotlib.figure import Figure

from planrunner.report.plots import BLUE, ORANGE, PURPLE, RC, VERMILLION, Plot, fit_margins

GROUP_STYLES = [(BLUE, "-", "|"), (VERMILLION, "--", "x"), (PURPLE, "-.", "+"), (ORANGE, ":", "1")]


def curve_plot(entry: dict[str, Any]) -> Plot | None:
    """The curves of every group (None when the entry holds none)."""
    details = entry.get("details") or {}
    km = details.get("kaplan_meier")
    if not km or not km.get("groups"):
        return None
    left = km.get("censoring") == "left"
    with matplotlib.rc_context(RC):
        fig = Figure(figsize=(7.0, 3.2))
        ax = fig.add_subplot()
        said = []
        for k, group in enumerate(km["groups"]):
            colour, line, mark = GROUP_STYLES[k % len(GROUP_STYLES)]
            points = group["points"]
            xs = [p[0] for p in points]
            ys = [p[1] for p in points]
            if left:
                # P(X ≤ x) is S(t⁻) on the flipped scale: constant from each value up to the next
                ax.step(xs, ys, where="post", color=colour, linestyle=line, linewidth=1.4, label=group["group"])
                marked = [(p[0], p[1]) for p in points if p[4] > 0]
            else:
                ax.step([0.0] + xs, [1.0] + ys, where="post", color=colour, linestyle=line, linewidth=1.4,
                        label=group["group"])
                marked = [(p[0], p[1]) for p in points if p[4] > 0]
            if marked:
                ax.plot([m[0] for m in marked], [m[1] for m in marked], linestyle="none", marker=mark,
                        color=colour, markersize=6, label=f"{group['group']}: " + (
                            "below the limit" if left else "censored"))
            said.append(f"{group['group']} ({group['n']} rows, {group['events']} "
                        f"{'detected' if left else 'events'}, {group['censored']} "
                        f"{'below the limit' if left else 'censored'})")
        ax.set_ylim(-0.02, 1.02)
        unit = f" ({entry['unit']})" if entry.get("unit") else ""
        ax.set_xlabel(f"{entry.get('outcome', 'time')}{unit}")
        ax.set_ylabel("proportion at or below" if left else "Kaplan–Meier survival")
        ax.legend(loc="lower left", bbox_to_anchor=(0.0, 1.0), ncol=4, frameon=False, fontsize=8, handlelength=2.6)
        fit_margins(ax, 4)
        buffer = io.StringIO()
        fig.savefig(buffer, format="svg", metadata={"Date": None})
    what = ("estimated proportion of values at or below each value (Kaplan–Meier on the flipped scale)" if left
            else "Kaplan–Meier survival curves")
    thinned = [g["group"] for g in km["groups"] if g.get("thinned_every", 1) > 1]
    alt = (f"Step lines of the {what} of {', '.join(said)}; each group has its own colour, line style and "
           f"marker, and the markers show where rows were {'below their limit' if left else 'censored'}"
           + (f"; every k-th time only for {', '.join(thinned)}" if thinned else "") + ".")
    return Plot(f"{entry['id']}-kaplan-meier", buffer.getvalue(), alt)
