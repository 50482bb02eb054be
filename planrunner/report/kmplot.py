"""The Kaplan–Meier curves of a censored analysis, one step line per group with its censoring marks,
drawn from the record's ``details.kaplan_meier`` alone (every point drawn is a number stored there).

Kept apart from ``plots`` (the resampling pictures) and written by the same SVG writer
(`report/canvas.py`: no ids, no date, text as text): the Okabe–Ito colours, each group also told
apart by its line style and marker, so a greyscale print keeps them apart.
"""

from __future__ import annotations

from typing import Any

from planrunner.report import canvas
from planrunner.report.canvas import Key, Line, Marker, Pen
from planrunner.report.plots import BLUE, ORANGE, PURPLE, VERMILLION, Plot

# colour, dash pattern (points), censoring marker of the first, second, ... group
GROUP_STYLES = [(BLUE, (), "|"), (VERMILLION, (5.6, 2.4), "x"), (PURPLE, (9.0, 2.4, 1.4, 2.4), "+"),
                (ORANGE, (1.4, 2.4), "y")]


def steps_after(xs: list[float], ys: list[float]) -> tuple[list[float], list[float]]:
    """The corners of a step line that keeps each y from its x up to the next x."""
    out_x, out_y = [], []
    for k, (x, y) in enumerate(zip(xs, ys)):
        if k:
            out_x.append(x)
            out_y.append(ys[k - 1])
        out_x.append(x)
        out_y.append(y)
    return out_x, out_y


def curve_plot(entry: dict[str, Any]) -> Plot | None:
    """The curves of every group (None when the entry holds none)."""
    details = entry.get("details") or {}
    km = details.get("kaplan_meier")
    if not km or not km.get("groups"):
        return None
    left = km.get("censoring") == "left"
    marks: list[canvas.Mark] = []
    keys: list[Key] = []
    said = []
    reach = [0.0]
    for k, group in enumerate(km["groups"]):
        colour, dashes, shape = GROUP_STYLES[k % len(GROUP_STYLES)]
        pen = Pen(colour, 1.4, dashes)
        points = group["points"]
        xs = [float(p[0]) for p in points]
        ys = [float(p[1]) for p in points]
        # right-censored: S = 1 from time 0 up to the first time; left-censored, P(X ≤ x) is S(t⁻) on
        # the flipped scale: constant from each value up to the next
        step_x, step_y = steps_after(xs, ys) if left else steps_after([0.0] + xs, [1.0] + ys)
        marks.append(Line(step_x, step_y, pen, name=f"curve-{k}"))
        keys.append(Key(group["group"], pen))
        reach += xs
        marked = [(p[0], p[1]) for p in points if p[4] > 0]
        if marked:
            marker = Marker(shape, 6.0, colour)
            marks.append(Line([m[0] for m in marked], [m[1] for m in marked], marker=marker, name=f"censored-{k}"))
            keys.append(Key(f"{group['group']}: " + ("below the limit" if left else "censored"), marker=marker))
        said.append(f"{group['group']} ({group['n']} rows, {group['events']} "
                    f"{'detected' if left else 'events'}, {group['censored']} "
                    f"{'below the limit' if left else 'censored'})")
    unit = f" ({entry['unit']})" if entry.get("unit") else ""
    low, high = min(reach), max(reach)
    pad = (high - low) * 0.04 or 0.5
    x = canvas.value_axis(low - pad, high + pad, f"{entry.get('outcome', 'time')}{unit}", count=10)
    y = canvas.value_axis(-0.02, 1.02, "proportion at or below" if left else "Kaplan–Meier survival")
    svg = canvas.Picture(504.0, 230.4, x, [canvas.Panel(y, marks)], keys, key_columns=4).svg()
    what = ("estimated proportion of values at or below each value (Kaplan–Meier on the flipped scale)" if left
            else "Kaplan–Meier survival curves")
    thinned = [g["group"] for g in km["groups"] if g.get("thinned_every", 1) > 1]
    alt = (f"Step lines of the {what} of {', '.join(said)}; each group has its own colour, line style and "
           f"marker, and the markers show where rows were {'below their limit' if left else 'censored'}"
           + (f"; every k-th time only for {', '.join(thinned)}" if thinned else "") + ".")
    return Plot(f"{entry['id']}-kaplan-meier", svg, alt)
