"""Pictures of one analysis, written as SVG by planrunner's own writer (`report/canvas.py`) from the
record alone.

Every mark drawn is a number already in the record: the histogram of the resampling (or null, or
pseudo-value) distribution, the estimate, the interval endpoints and their Monte Carlo bands, the
counts behind a p-value. Nothing here computes a statistic.

Looks: bars in light grey, marks in the Okabe–Ito colours (distinguishable with the common colour
vision deficiencies) and each mark also told apart by line style or hatching, so a greyscale print
keeps every meaning. Each interval method has one colour and line style in every picture
(`METHOD_STYLES`), so BCa looks the same wherever it appears. A distribution with few distinct
values (the record's `distribution.support`) is drawn as spikes at those values, not as bars that
alternate between full and empty; a weighted one (every arrangement or resample with its
probability) shows probabilities, never counts of 10⁶⁵. Tick labels carry their own digits (no
axis offset or multiplier text). A thin grey line marks the value of no effect (0 for a difference
or a correlation, 1 for a ratio) and long dashes the decision's margin or limits when the record has
them. Text is written as text and escaped, so a `$` or a `<` in a unit stays what it is.

Byte stability: the writer has no random ids and no date and rounds every coordinate to 2 decimals;
the same record gives the same bytes.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from planrunner.engines.statistics import STATISTICS, null_value
from planrunner.report import canvas, labels
from planrunner.report import digits as precision
from planrunner.report.canvas import Area, Bars, Fill, Key, Line, Marker, Pen, Rule, Segments
from planrunner.report.labels import INTERVAL_NAMES

# Okabe & Ito (2008) colours, each paired with a line style so that greyscale keeps them apart
BLUE, GREEN, PURPLE, ORANGE, VERMILLION, SKY = "#0072B2", "#009E73", "#CC79A7", "#E69F00", "#D55E00", "#56B4E9"
BAR, BAR_EDGE = "#d4d4d4", "#7a7a7a"
NULL_LINE, DECISION_LINE = "#555555", "#000000"


@dataclass(frozen=True)
class MethodStyle:
    """How one interval method is drawn and named, the same in every picture and page."""

    colour: str
    line: tuple[float, ...]  # the dash pattern (on, off, ...) in points
    name: str  # the name in the trade's spelling

    def pen(self, width: float) -> Pen:
        return Pen(self.colour, width, self.line)


# one fixed style per interval method, never by its position in the plan's list; dashes in points
METHOD_STYLES = {method: MethodStyle(colour, line, INTERVAL_NAMES[method]) for method, colour, line in (
    ("percentile", BLUE, (6.0, 2.5)),
    ("bca", GREEN, (1.6, 2.5)),
    ("basic", PURPLE, (10.0, 2.5, 1.6, 2.5)),
    ("normal", ORANGE, (8.0, 1.6, 1.6, 1.6)),
    ("studentized", VERMILLION, (4.8, 1.6, 1.6, 1.6, 1.6, 1.6)),
    ("shift", SKY, (9.6, 3.2)),
)}
OTHER_METHOD = MethodStyle("#444444", (3.2, 3.2), "")


def method_style(method: Any) -> MethodStyle:
    """The style of an interval method; a method this version does not know gets a neutral one."""
    known = METHOD_STYLES.get(str(method))
    return known if known is not None else MethodStyle(OTHER_METHOD.colour, OTHER_METHOD.line, str(method))


def method_name(method: Any) -> str:
    """An interval method as a reader writes it: BCa, percentile, basic, normal, studentized, shift."""
    return method_style(method).name


# statistics whose value of no effect is 0 (a difference, a correlation, a slope, a centred t) or 1 (a ratio)
def decision_marks(entry: dict[str, Any]) -> list[tuple[str, float]]:
    """(label, value) of the decision's margin, limit or limits, read defensively: a record without
    ``decision``, or with one whose values are missing or not finite numbers, gives none."""
    decision = entry.get("decision")
    if not isinstance(decision, dict):
        return []
    marks: list[tuple[str, float]] = []
    if _finite(decision.get("margin")):
        marks.append(("margin", float(decision["margin"])))
    if _finite(decision.get("limit")):
        marks.append(("limit", float(decision["limit"])))
    limits = decision.get("limits")
    if isinstance(limits, (list, tuple)):
        marks += [("limit", v) for v in _finite(*limits)]
    return marks


@dataclass(frozen=True)
class Plot:
    """One picture: a file-name stem, the SVG document and its text alternative."""

    name: str
    svg: str
    alt: str


Formatter = Callable[..., str]


def in_outcome_units(statistic: str | None) -> bool:
    """Whether the statistic is measured in the outcome's unit: a mean or a median of a numeric
    outcome, or a difference of two. A correlation, a proportion or a statistic we know nothing
    about gets no unit rather than a wrong one."""
    known = STATISTICS.get(statistic or "")
    return known is not None and known.outcome == "numeric" and known.form in ("mean", "median") and known.columns == 1


def axis_label(entry: dict[str, Any], prefix: str = "") -> str:
    label = f"{prefix}{entry.get('statistic_label') or entry.get('statistic') or 'statistic'}"
    return f"{label} ({entry['unit']})" if entry.get("unit") and in_outcome_units(entry.get("statistic")) else label


@dataclass(frozen=True)
class Shape:
    """What a picture draws of a distribution: bars (``edges`` around ``heights``) or spikes (one
    height at each of ``points``), and what a height is (``ylabel``)."""

    edges: list[float]
    points: list[float]
    heights: list[float]
    ylabel: str
    probability: bool

    @property
    def spikes(self) -> bool:
        return bool(self.points)

    @property
    def span(self) -> tuple[float, float]:
        ends = self.points if self.spikes else [self.edges[0], self.edges[-1]]
        return min(ends), max(ends)


def _numbers(values: Any) -> list[float] | None:
    """The list as floats when every item is a finite number, else None."""
    if not isinstance(values, list) or not values:
        return None
    finite = _finite(*values)
    return finite if len(finite) == len(values) else None


def distribution_shape(entry: dict[str, Any], things: str) -> Shape | None:
    """How to draw the entry's distribution: spikes at its support points when the record lists
    them, else the histogram's bars; probabilities when the distribution is weighted (every
    arrangement or resample with its probability), else counts of ``things`` (e.g. "replicates")."""
    dist = entry.get("distribution") or {}
    hist = dist.get("histogram") or {}
    weighted = bool(dist.get("weighted")) or "probabilities" in hist or hist.get("counts_are") == "probability"
    support: dict[str, Any] = dist["support"] if isinstance(dist.get("support"), dict) else {}
    points, shares = _numbers(support.get("values")), _numbers(support.get("probabilities"))
    if points and shares and len(points) == len(shares):
        if weighted:
            return Shape([], points, shares, "probability", True)
        size = (_finite(dist.get("size")) or [0.0])[0]
        return Shape([], points, [float(round(p * size)) for p in shares], f"{things} at each value", False)
    edges, counts = _numbers(hist.get("edges")), _numbers(hist.get("counts"))
    if not edges or not counts or len(edges) != len(counts) + 1:
        return None
    if weighted:
        raw = _numbers(hist.get("probabilities")) or counts
        total = sum(raw) + (_finite(dist.get("infinite")) or [0.0])[0]
        return Shape(edges, [], [c / total if total > 0 else 0.0 for c in raw], "probability per bar", True)
    return Shape(edges, [], counts, f"{things} per bar", False)


@dataclass
class Sketch:
    """The marks and key entries of one picture as they are gathered, before the axes are known."""

    marks: list[canvas.Mark] = field(default_factory=list)
    keys: list[Key] = field(default_factory=list)

    def add(self, mark: canvas.Mark, key: Key | None = None) -> None:
        self.marks.append(mark)
        if key is not None:
            self.keys.append(key)

    def picture(self, x: canvas.Axis, y: canvas.Axis, height: float = 216.0, key_columns: int = 3) -> str:
        """The SVG text: 7 × 3 inches (504 × 216 points) unless told otherwise."""
        return canvas.Picture(504.0, height, x, [canvas.Panel(y, self.marks)], self.keys, key_columns).svg()


def _draw(sketch: Sketch, shape: Shape) -> float:
    """Bars or spikes in grey; returns the tallest height."""
    if shape.spikes:
        sketch.add(Segments([(x, 0.0, x, h) for x, h in zip(shape.points, shape.heights)], Pen(BAR_EDGE, 1.6),
                            name="spikes"))
        sketch.add(Line(shape.points, shape.heights, marker=Marker("o", 3.0, BAR_EDGE), name="spike-heads"))
    else:
        sketch.add(Bars(shape.edges, shape.heights, Fill(BAR, edge=Pen(BAR_EDGE, 0.6))))
    return max(shape.heights) if shape.heights else 0.0


def _finite(*values: Any) -> list[float]:
    return [float(v) for v in values if isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)]


def _x_axis(shape: Shape, title: str, *marks: Any) -> canvas.Axis:
    """The x axis: the drawn distribution and every mark, with 4% of the width to spare on each side."""
    points = _finite(*shape.span, *marks)
    lo, hi = min(points), max(points)
    pad = (hi - lo) * 0.04 or 0.5
    return canvas.value_axis(lo - pad, hi + pad, title, count=10)


def _y_axis(shape: Shape, top: float) -> canvas.Axis:
    """Heights from 0 to ``top``: whole-number ticks for counts, which are whole numbers."""
    return canvas.value_axis(0.0, top or 1.0, shape.ylabel, whole=not shape.probability)


def _reference_lines(sketch: Sketch, entry: dict[str, Any], shape: Shape, fmt: Formatter,
                     *marks: Any) -> tuple[list[float], list[str]]:
    """The line of no effect and the decision's margin or limits, each drawn when it lies within one
    width of the drawn range (beyond that it would squeeze the picture, and the text says so).
    Returns the values drawn (to keep in view) and the sentences for the text alternative."""
    lo, hi = min(_finite(*shape.span, *marks)), max(_finite(*shape.span, *marks))
    width = (hi - lo) or 1.0
    drawn: list[float] = []
    said: list[str] = []
    none_value = null_value(entry.get("statistic"))
    if none_value is not None:
        if lo - width <= none_value <= hi + width:
            pen = Pen(NULL_LINE, 1.0)
            sketch.add(Rule(none_value, pen, name="no-effect"), Key(f"no effect {fmt(none_value)}", pen))
            drawn.append(none_value)
            said.append(f"a thin grey line marks no effect ({fmt(none_value)})")
        else:
            said.append(f"no effect ({fmt(none_value)}) lies outside the drawn range")
    # a bootstrap's stated null value (its p-value's), when it is not the value of no effect already drawn
    given = _finite(((entry.get("details") or {}).get("null_test") or {}).get("null_value"))
    if given and given[0] != none_value:
        stated = given[0]
        if lo - width <= stated <= hi + width:
            pen = Pen(NULL_LINE, 1.0, (1.0, 2.0))
            sketch.add(Rule(stated, pen, name="null-value"), Key(f"null value {fmt(stated)}", pen))
            drawn.append(stated)
            said.append(f"a dotted grey line marks the null value of the p-value ({fmt(stated)})")
        else:
            said.append(f"the null value of the p-value ({fmt(stated)}) lies outside the drawn range")
    groups: dict[str, list[float]] = {}
    for label, value in decision_marks(entry):
        groups.setdefault(label, []).append(value)
    for label, values in groups.items():
        shown = [v for v in values if lo - width <= v <= hi + width]
        name = f"decision {label}{'s' if len(values) > 1 else ''} {' and '.join(fmt(v) for v in values)}"
        pen = Pen(DECISION_LINE, 1.2, (9.6, 3.6))
        for k, value in enumerate(shown):
            sketch.add(Rule(value, pen, name="decision"), Key(name, pen) if k == 0 else None)
        drawn += shown
        said.append(f"long dashes mark the {name}" if len(shown) == len(values)
                    else f"the {name} {'lie' if len(values) > 1 else 'lies'} partly outside the drawn range")
    return drawn, said


def _what_drawn(shape: Shape, what: str) -> str:
    """The start of a text alternative: what kind of picture of which distribution."""
    if shape.spikes:
        return (f"Spikes at the {len(shape.points)} values taken by {what}, each as tall as the "
                f"{'probability' if shape.probability else 'number'} of that value")
    return f"Histogram of {what}" + (" (bar heights are probabilities)" if shape.probability else "")


SOLID_BLACK = Pen("#000000", 2.0)


def resampling_plot(entry: dict[str, Any], fmt: Formatter) -> Plot | None:
    """Bootstrap replicates: bars or spikes, the estimate, each interval and the Monte Carlo band of its ends."""
    shape = distribution_shape(entry, "replicates")
    if shape is None:
        return None
    bands = {b["method"]: b for b in (entry.get("monte_carlo") or {}).get("intervals") or []}
    sketch = Sketch()
    top = _draw(sketch, shape)
    estimate = entry.get("estimate")
    marks: list[Any] = [estimate]
    for value in _finite(estimate):
        sketch.add(Rule(value, SOLID_BLACK, name="estimate"), Key(f"estimate {fmt(estimate)}", SOLID_BLACK))
    alt_parts = []
    band_labelled = False
    for k, interval in enumerate(entry.get("intervals") or []):
        style = method_style(interval.get("method"))
        lower, upper = interval.get("lower"), interval.get("upper")
        side = labels.one_sided(interval)
        name = labels.interval_label(interval, format(interval["level"] * 100, "g"))
        kind = "" if side else " interval"
        ends = [e for e, key in ((lower, "lower"), (upper, "upper")) if side in (None, key)]
        if len(_finite(*ends)) < len(ends):
            alt_parts.append(f"{name}{kind} not available")
            continue
        y = top * (1.06 + 0.1 * k)
        # a one-sided bound runs from its end to the edge of the replicates on its open side
        span_lo, span_hi = shape.span
        x0 = lower if lower is not None else min(span_lo, upper)
        x1 = upper if upper is not None else max(span_hi, lower)
        tag = f"interval-{interval.get('method')}"
        sketch.add(Line([x0, x1], [y, y], style.pen(1.6), name=tag), Key(f"{name}{kind}", style.pen(1.6)))
        sketch.add(Segments([(e, 0.0, e, y) for e in ends], style.pen(1.0), name=f"{tag}-ends"))
        marks += ends
        band = bands.get(interval["method"]) or {}
        band_text = []
        for which in ("lower_band", "upper_band"):
            if band.get(which) and len(_finite(*band[which])) == 2:
                lo, hi = band[which]
                fill = Fill(style.colour, 0.35, edge=Pen(style.colour, 0.8))
                sketch.add(Area(lo, hi, y - top * 0.025, y + top * 0.025, fill, name="band"),
                           None if band_labelled else Key("Monte Carlo band of the ends", fill=fill))
                band_labelled = True
                marks += [lo, hi]
                band_text.append(f"{fmt(lo)} to {fmt(hi)}")
        shown = " to ".join(fmt(e) for e in ends) + (f" ({'upper' if side == 'lower' else 'lower'} end open)"
                                                     if side else "")
        alt_parts.append(f"{name}{kind} {shown}"
                         + (f" (Monte Carlo band of the {'end' if side else 'ends'}: {'; '.join(band_text)})"
                            if band_text else ""))
    drawn, said = _reference_lines(sketch, entry, shape, fmt, *marks)
    svg = sketch.picture(_x_axis(shape, axis_label(entry), *marks, *drawn),
                         _y_axis(shape, top * (1.12 + 0.1 * max(len(entry.get("intervals") or []) - 1, 0))))
    size = (entry.get("distribution") or {}).get("size")
    lo, hi = shape.span
    alt = (f"{_what_drawn(shape, f'{precision.count(size)} bootstrap replicates of the {axis_label(entry)}')}, "
           f"from {fmt(lo)} to {fmt(hi)}; the estimate {fmt(estimate)} is a solid black line"
           + ("; " + "; ".join(alt_parts + said) if alt_parts or said else "") + ".")
    return Plot(f"{entry['id']}-resampling", svg, alt)


def tail_side(entry: dict[str, Any]) -> str | None:
    """Which side of the observed value the p-value counts: 'greater', 'less' or None (unknown)."""
    details = entry.get("details") or {}
    alternative = entry.get("alternative")
    if alternative in ("greater", "less"):
        return alternative
    if alternative == "two-sided" and details.get("two_sided_rule") == "doubled":
        # p = 2·min(p_greater, p_less): the smaller tail is the one doubled (the one-sided
        # p-values when the record has them: an exact DP null's counts can exceed any integer type)
        ge = details.get("p_greater", details.get("count_greater_equal"))
        le = details.get("p_less", details.get("count_less_equal"))
        if isinstance(ge, (int, float)) and isinstance(le, (int, float)):
            return "greater" if ge <= le else "less"
    return None


TAIL_FILL = Fill(VERMILLION, 0.55, hatch=True)
TAIL_PEN = Pen(VERMILLION, 2.2)
TAIL_HEAD = Marker("s", 4.0, VERMILLION)


def _shade_tail(sketch: Sketch, shape: Shape, side: str, observed: float, tolerance: float) -> None:
    """The part of the distribution on the counted side of the observed value: the bars cut at it,
    or the spikes at or beyond it (within the test's tie tolerance), in hatched vermillion."""
    if shape.spikes:
        counted = [(x, h) for x, h in zip(shape.points, shape.heights)
                   if (x >= observed - tolerance if side == "greater" else x <= observed + tolerance)]
        if counted:
            sketch.add(Segments([(x, 0.0, x, h) for x, h in counted], TAIL_PEN, name="tail"))
            sketch.add(Line([x for x, _ in counted], [h for _, h in counted], marker=TAIL_HEAD, name="tail-heads"))
        return
    for left, right, c in zip(shape.edges[:-1], shape.edges[1:], shape.heights):
        lo, hi = (max(left, observed), right) if side == "greater" else (left, min(right, observed))
        if c and hi > lo:
            sketch.add(Area(lo, hi, 0.0, c, TAIL_FILL, name="tail"))


def null_plot(entry: dict[str, Any], fmt: Formatter, fmt_p: Formatter) -> Plot | None:
    """Permutation null: bars or spikes, the observed statistic and, shaded, the tail that makes the p-value."""
    shape = distribution_shape(entry, "arrangements" if entry.get("exact") else "permutations")
    if shape is None:
        return None
    observed = entry.get("estimate")
    side = tail_side(entry)
    details = entry.get("details") or {}
    sketch = Sketch()
    top = _draw(sketch, shape)
    if side is not None and isinstance(observed, (int, float)) and _finite(observed):
        scale = max(abs(v) for v in _finite(observed, *shape.span))
        tolerance = max(_finite(details.get("tolerance")) + [scale * 2.0**-40])
        _shade_tail(sketch, shape, side, float(observed), abs(tolerance))
        doubled = " (doubled)" if entry.get("alternative") == "two-sided" else ""
        sketch.keys.append(Key(f"values counted for the p-value{doubled}", TAIL_PEN, TAIL_HEAD) if shape.spikes
                           else Key(f"tail counted for the p-value{doubled}", fill=TAIL_FILL))
    for value in _finite(observed):
        sketch.add(Rule(value, SOLID_BLACK, name="observed"), Key(f"observed {fmt(observed)}", SOLID_BLACK))
    drawn, said = _reference_lines(sketch, entry, shape, fmt, observed)
    svg = sketch.picture(_x_axis(shape, axis_label(entry), observed, *drawn), _y_axis(shape, top * 1.08))
    size = (entry.get("distribution") or {}).get("size")
    count_key = {"greater": "count_greater_equal", "less": "count_less_equal"}.get(side or "")
    what = "all arrangements" if entry.get("exact") else "random permutations"
    tail = ""
    if count_key:
        relation = "at or above" if side == "greater" else "at or below"
        alpha = (entry.get("settings") or {}).get("alpha")
        tail = (f"; shaded: the {precision.count(details.get(count_key))} values {relation} the observed value"
                f"{', doubled for the two-sided p-value' if entry.get('alternative') == 'two-sided' else ''}"
                f" (p = {fmt_p(entry.get('p_value'), (entry.get('monte_carlo') or {}).get('p_value_sd'), alpha)})")
    lo, hi = shape.span
    alt = (f"{_what_drawn(shape, f'the permutation null distribution ({precision.count(size)} {what})')} "
           f"of the {axis_label(entry)}, "
           f"from {fmt(lo)} to {fmt(hi)}; the observed value {fmt(observed)} is a solid black "
           f"line{tail}" + ("; " + "; ".join(said) if said else "") + ".")
    return Plot(f"{entry['id']}-null", svg, alt)


def pseudo_value_plot(entry: dict[str, Any], fmt: Formatter) -> Plot | None:
    """Jackknife pseudo-values: bars or spikes, the estimate and the bias-corrected estimate (their mean)."""
    shape = distribution_shape(entry, "observations")
    if shape is None:
        return None
    estimate = entry.get("estimate")
    corrected = (entry.get("details") or {}).get("corrected_estimate")
    sketch = Sketch()
    top = _draw(sketch, shape)
    for value in _finite(estimate):
        sketch.add(Rule(value, SOLID_BLACK, name="estimate"), Key(f"estimate {fmt(estimate)}", SOLID_BLACK))
    for value in _finite(corrected):
        pen = Pen(BLUE, 1.6, (6.0, 2.5))
        sketch.add(Rule(value, pen, name="corrected"),
                   Key(f"bias-corrected (mean of pseudo-values) {fmt(corrected)}", pen))
    drawn, said = _reference_lines(sketch, entry, shape, fmt, estimate, corrected)
    svg = sketch.picture(_x_axis(shape, axis_label(entry, "pseudo-value, "), estimate, corrected, *drawn),
                         _y_axis(shape, top * 1.08))
    size = (entry.get("distribution") or {}).get("size")
    lo, hi = shape.span
    alt = (f"{_what_drawn(shape, f'the {size} jackknife pseudo-values of the {axis_label(entry)}')}, from "
           f"{fmt(lo)} to {fmt(hi)}; the estimate {fmt(estimate)} is a solid "
           f"black line and the bias-corrected estimate {fmt(corrected)} a dashed blue line"
           + ("; " + "; ".join(said) if said else "")
           + ". Isolated bars far from the rest are observations with a large influence on the estimate.")
    return Plot(f"{entry['id']}-pseudo-values", svg, alt)


def plots_for(entry: dict[str, Any], fmt: Formatter, fmt_p: Formatter) -> list[Plot]:
    """The pictures of one analysis (none when its distribution has no finite value)."""
    method = entry.get("method")
    if method == "bootstrap":
        made = [resampling_plot(entry, fmt)]
    elif method == "permutation":
        made = [null_plot(entry, fmt, fmt_p)]
    elif method == "jackknife":
        made = [pseudo_value_plot(entry, fmt)]
    else:
        made = []
    return [p for p in made if p is not None]


_PROLOG = re.compile(r"\A.*?(?=<svg\b)", re.S)


def inline_svg(plot: Plot, prefix: str, html_escape: Callable[[str], str]) -> str:
    """The SVG ready to sit inside an HTML page: no XML prolog, ids made unique by `prefix` (several
    pictures share one document), and the text alternative as its title."""
    text = _PROLOG.sub("", plot.svg, count=1)
    text = re.sub(r'\bid="([^"]+)"', lambda m: f'id="{prefix}{m.group(1)}"', text)
    text = re.sub(r"url\(#([^)]+)\)", lambda m: f"url(#{prefix}{m.group(1)})", text)
    title = f'<title id="{prefix}title">{html_escape(plot.alt)}</title>'
    return re.sub(r"<svg\b([^>]*)>", lambda m: f'<svg{m.group(1)} role="img" aria-labelledby="{prefix}title">'
                  f"\n {title}", text, count=1).strip() + "\n"


def file_svg(plot: Plot, xml_escape: Callable[[str], str]) -> str:
    """The SVG as a file beside the Markdown report, with its text alternative as its title."""
    title = f"<title>{xml_escape(plot.alt)}</title>"
    return re.sub(r"(<svg\b[^>]*>)", lambda m: f"{m.group(1)}\n {title}", plot.svg, count=1)
