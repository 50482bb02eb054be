"""planrunner's own small SVG writer: a picture is plain data (panels of marks on axes, a key of
labelled samples), and `Picture.svg()` writes it as SVG text in one pass.

Why not a plotting library: the reports need only a handful of marks (bars, spikes, step lines,
polylines, shaded areas, rules across a panel, point markers), and importing and driving a general
plotting library cost more than a quarter of a demo run. Here every drawn thing is written directly:

- Text stays text (`<text>` elements, searchable and copyable), in a generic font stack whose last
  member is the generic family `sans-serif`, so every system has a font for it.
- Byte-stable: no random ids (the one pattern is called ``hatch``; `plots.inline_svg` prefixes ids
  when several pictures share a page), no dates, coordinates rounded to 2 decimals (a hundredth of a
  point) and written without trailing zeros.
- Every text is escaped for XML (``&``, ``<``, ``>`` and both quotes), so a label can hold anything.
- Marks carry a ``class`` name (``bars``, ``spikes``, a caller's name such as ``estimate``), so tests
  and style sheets can find them; meaning is never in the colour alone (callers pair each colour with
  a dash pattern, marker or hatching).

Ticks follow Heckbert's "nice numbers" rule (P. S. Heckbert, "Nice numbers for graph labels", in
A. S. Glassner (ed.), Graphics Gems, Academic Press, 1990, pp. 61–63, 657–659): the step is 1, 2 or
5 times a power of ten, chosen from the range rounded up to such a number. Units are points (1/72
inch), the SVG's user unit; the layout reserves room for texts from their number of characters.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

FONT_STACK = "DejaVu Sans, Liberation Sans, Arial, Helvetica, sans-serif"
TEXT_SIZE, KEY_SIZE = 9.0, 8.0  # points: tick labels and axis titles; the key
CHAR_EM = 0.62  # a character's width in em, generous for digits, minus signs and lower-case text
LINE_EM = 1.25  # a line of text's height in em
TICK, TICK_PAD, EDGE = 3.5, 3.5, 5.0  # tick length, gap to its label, blank edge of the picture
HANDLE = 22.0  # length of a key's sample line


def number(value: float) -> str:
    """A coordinate to 2 decimals without trailing zeros: the same float gives the same text."""
    text = f"{value:.2f}".rstrip("0").rstrip(".")
    return "0" if text in ("-0", "") else text


def escape(text: str) -> str:
    """Text for an XML element or attribute."""
    return (str(text).replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
            .replace('"', "&quot;").replace("'", "&#39;"))


NARROW, WIDE = set("ijlftr.,;:'!|() 1"), set("mwMW@%")


def text_width(text: str, size: float) -> float:
    """A generous estimate of a text's width in points, from its characters (narrow ones such as
    ``i`` or ``1`` count 0.35 em, wide ones such as ``m`` 0.9 em, the rest CHAR_EM): the layout
    reserves room from it instead of measuring text with a font renderer."""
    def em(line: str) -> float:
        return sum(0.35 if c in NARROW else 0.9 if c in WIDE else CHAR_EM for c in line)

    return size * max((em(line) for line in str(text).split("\n")), default=0.0)


# --- ticks -------------------------------------------------------------------------------------------

def nice_number(x: float, rounded: bool) -> float:
    """Heckbert (1990): a number 1, 2 or 5 times a power of ten near ``x`` (rounded to the nearest,
    or the smallest such number at or above ``x``)."""
    exponent = math.floor(math.log10(x))
    fraction = x / 10.0**exponent
    if rounded:
        nice = 1.0 if fraction < 1.5 else 2.0 if fraction < 3.0 else 5.0 if fraction < 7.0 else 10.0
    else:
        nice = 1.0 if fraction <= 1.0 else 2.0 if fraction <= 2.0 else 5.0 if fraction <= 5.0 else 10.0
    return nice * 10.0**exponent


def loose_ticks(low: float, high: float, count: int) -> list[float]:
    """Heckbert's loose labelling: about ``count`` ticks at a nice step, from the last multiple of the
    step at or below ``low`` to the first at or above ``high``."""
    if not (math.isfinite(low) and math.isfinite(high)) or high <= low:
        return [low] if math.isfinite(low) else []
    span = nice_number(high - low, rounded=False)
    step = nice_number(span / (count - 1), rounded=True)
    first, last = math.floor(low / step), math.ceil(high / step)
    return [_clean(k * step, step) for k in range(first, last + 1)]


def _clean(value: float, step: float) -> float:
    """k·step without the binary residue (0.30000000000000004 → 0.3), to the step's own digits."""
    digits = max(0, -math.floor(math.log10(step))) + 1
    cleaned = round(value, digits)
    return 0.0 if cleaned == 0 else cleaned


def ticks_within(low: float, high: float, count: int = 7, whole: bool = False) -> list[float]:
    """The nice ticks that fall inside [low, high]: at least four when the range allows (more are
    asked for when the loose labels' step leaves fewer inside); ``whole`` for counts (step ≥ 1)."""
    inside: list[float] = []
    for asked in (count, count + 2, count + 5):
        ticks = loose_ticks(low, high, asked)
        if whole and len(ticks) > 1 and ticks[1] - ticks[0] < 1:
            ticks = [float(v) for v in range(math.ceil(low), math.floor(high) + 1)]
        slack = (high - low) * 1e-9
        inside = [t for t in ticks if low - slack <= t <= high + slack]
        if len(inside) >= 4:
            break
    return inside


def log_ticks(low: float, high: float) -> list[float]:
    """Ticks of a logarithmic axis: 1, 2 and 5 times each power of ten in [low, high], only the
    powers of ten beyond three decades, and every k-th of those beyond eight."""
    first, last = math.floor(math.log10(low)), math.ceil(math.log10(high))
    decades = last - first
    factors = (1.0, 2.0, 5.0) if decades <= 3 else (1.0,)
    every = max(1, math.ceil(decades / 8))
    ticks = [float(f"{f}e{e}") for e in range(first, last + 1) if (e - first) % every == 0 for f in factors]
    return [t for t in ticks if low * (1 - 1e-9) <= t <= high * (1 + 1e-9)]


def tick_labels(values: Sequence[float]) -> list[str]:
    """Labels that each say their whole value with just enough digits to tell neighbours apart: no
    offset or multiplier printed apart from the ticks, where it is easily missed."""
    values = [float(v) for v in values]
    finite = sorted(v for v in values if math.isfinite(v))
    big = max((abs(v) for v in finite), default=0.0)
    steps = [b - a for a, b in zip(finite, finite[1:]) if b > a]
    step = min(steps) if steps else (big or 1.0)
    positional = big == 0.0 or 1e-4 <= big < 1e6
    labels: list[str] = []
    for digits in range(17):
        labels = [_tick_text(v, digits, positional) for v in values]
        if all(not math.isfinite(v) or abs(float(t.replace("\u2212", "-")) - v) <= step * 1e-3
               for t, v in zip(labels, values)):
            return labels
    return labels


def _tick_text(value: float, digits: int, positional: bool) -> str:
    if not math.isfinite(value):
        return str(value)
    text = f"{value:.{digits}f}" if positional else f"{value:.{digits}e}"
    if not positional:
        mantissa, exponent = text.split("e")
        text = f"{mantissa}e{int(exponent)}"
    if float(text) == 0.0:
        return "0"
    return text.replace("-", "\u2212")


# --- what is drawn -----------------------------------------------------------------------------------

@dataclass(frozen=True)
class Pen:
    """How a line is stroked: colour, width in points, dash pattern (on, off, ...) in points."""

    colour: str
    width: float = 1.0
    dashes: tuple[float, ...] = ()

    def attributes(self) -> str:
        dash = f' stroke-dasharray="{" ".join(number(d) for d in self.dashes)}"' if self.dashes else ""
        return f'fill="none" stroke="{self.colour}" stroke-width="{number(self.width)}"{dash}'


@dataclass(frozen=True)
class Fill:
    """How an area is filled: colour and opacity, optionally black diagonal hatching over it and an edge."""

    colour: str
    opacity: float = 1.0
    hatch: bool = False
    edge: Pen | None = None


@dataclass(frozen=True)
class Marker:
    """A point marker: ``o`` circle, ``s`` square, ``^``/``v`` triangles, ``|`` tick, ``_`` dash,
    ``x``, ``+``, ``y`` (three spokes); size is its width in points; hollow ones are filled white."""

    shape: str
    size: float
    colour: str
    hollow: bool = False


@dataclass(frozen=True)
class Line:
    """A polyline through (xs, ys), and/or a marker at each point (pen None: markers only)."""

    xs: Sequence[float]
    ys: Sequence[float]
    pen: Pen | None = None
    marker: Marker | None = None
    name: str = "line"


@dataclass(frozen=True)
class Bars:
    """A histogram: a bar from edges[k] to edges[k + 1] of height heights[k] (empty bars not drawn)."""

    edges: Sequence[float]
    heights: Sequence[float]
    fill: Fill
    name: str = "bars"


@dataclass(frozen=True)
class Area:
    """A shaded rectangle in data coordinates."""

    x0: float
    x1: float
    y0: float
    y1: float
    fill: Fill
    name: str = "area"


@dataclass(frozen=True)
class Segments:
    """Separate straight segments (x0, y0, x1, y1), e.g. spikes or interval ends, in one pen."""

    segments: Sequence[tuple[float, float, float, float]]
    pen: Pen
    name: str = "segments"


@dataclass(frozen=True)
class Rule:
    """A line across the whole panel at ``at``: vertical (an x value) or horizontal (a y value)."""

    at: float
    pen: Pen
    vertical: bool = True
    name: str = "rule"


Mark = Line | Bars | Area | Segments | Rule


@dataclass(frozen=True)
class Key:
    """One entry of the picture's key: its label and a sample (a line, a marker and/or a patch)."""

    label: str
    pen: Pen | None = None
    marker: Marker | None = None
    fill: Fill | None = None


@dataclass
class Axis:
    """One axis: its range, ticks (values and labels), title; linear or base-10 logarithmic."""

    low: float
    high: float
    ticks: Sequence[float] = ()
    labels: Sequence[str] = ()
    title: str = ""
    log: bool = False
    label_size: float = TEXT_SIZE

    def share(self, value: float) -> float:
        """Where ``value`` lies from low (0) to high (1)."""
        if self.log:
            return (math.log10(value) - math.log10(self.low)) / (math.log10(self.high) - math.log10(self.low))
        return (value - self.low) / (self.high - self.low)


def value_axis(low: float, high: float, title: str = "", count: int = 7, whole: bool = False) -> Axis:
    """A linear axis with nice ticks inside its range and labels that carry their whole value."""
    ticks = ticks_within(low, high, count, whole)
    return Axis(low, high, ticks, tick_labels(ticks), title)


@dataclass
class Panel:
    """One plotting area: its y axis and marks (the picture's panels share one x axis)."""

    y: Axis
    marks: list[Mark] = field(default_factory=list)
    weight: float = 1.0  # share of the height among the panels


@dataclass
class Picture:
    """A whole picture: size in points, panels stacked top to bottom over one x axis, and a key above."""

    width: float
    height: float
    x: Axis
    panels: list[Panel]
    keys: list[Key] = field(default_factory=list)
    key_columns: int = 3

    def svg(self) -> str:
        return _Writer(self).document()


@dataclass(frozen=True)
class _Box:
    left: float
    top: float
    right: float
    bottom: float


class _Writer:
    """Lays a picture out (margins from the texts' lengths) and writes its elements."""

    def __init__(self, picture: Picture) -> None:
        self.p = picture
        self.out: list[str] = []
        self.hatched = False
        self.columns, self.column_widths = self._key_layout()

    # layout
    def _key_layout(self) -> tuple[int, list[float]]:
        labels = [k.label for k in self.p.keys]
        room = self.p.width - 2 * EDGE - self._left()
        columns = max(1, min(self.p.key_columns, len(labels)))
        while True:
            widths = [max(self._key_width(lab) for lab in labels[c::columns]) for c in range(columns)] if labels else []
            if columns == 1 or sum(widths) <= room:
                return columns, widths
            columns -= 1

    @staticmethod
    def _key_width(label: str) -> float:
        return HANDLE + 0.6 * KEY_SIZE + text_width(label, KEY_SIZE) + 1.5 * KEY_SIZE

    def _left(self) -> float:
        widest = max((text_width(t, panel.y.label_size) for panel in self.p.panels for t in panel.y.labels),
                     default=0.0)
        title = LINE_EM * TEXT_SIZE if any(panel.y.title for panel in self.p.panels) else 0.0
        return EDGE + title + 3.0 + TICK + TICK_PAD + widest

    def _bottom(self) -> float:
        lines = max((len(t.split("\n")) for t in self.p.x.labels), default=1)
        title = LINE_EM * TEXT_SIZE + 2.0 if self.p.x.title else 0.0
        return EDGE + TICK + TICK_PAD + lines * LINE_EM * self.p.x.label_size + title

    def _top(self) -> float:
        rows = -(-len(self.p.keys) // self.columns) if self.p.keys else 0
        return EDGE + rows * 1.6 * KEY_SIZE + (4.0 if rows else 0.0)

    def _right(self) -> float:
        last = self.p.x.labels[-1] if self.p.x.labels else ""
        return max(EDGE + 2.0, text_width(last, self.p.x.label_size) / 2 + EDGE)

    def boxes(self) -> list[_Box]:
        left, right = self._left(), self.p.width - self._right()
        top, bottom = self._top(), self.p.height - self._bottom()
        gap = 12.0 if len(self.p.panels) > 1 else 0.0
        room = bottom - top - gap * (len(self.p.panels) - 1)
        total = sum(panel.weight for panel in self.p.panels)
        out, y = [], top
        for panel in self.p.panels:
            h = room * panel.weight / total
            out.append(_Box(left, y, right, y + h))
            y += h + gap
        return out

    # document
    def document(self) -> str:
        w, h = number(self.p.width), number(self.p.height)
        body: list[str] = []
        boxes = self.boxes()
        for k, (panel, box) in enumerate(zip(self.p.panels, boxes)):
            body += self._panel(panel, box, last=k == len(boxes) - 1)
        body += self._key(boxes[0])
        defs = ([' <defs>\n  <pattern id="hatch" patternUnits="userSpaceOnUse" width="6" height="6">'
                 '<path d="M-1 1L1 -1M0 6L6 0M5 7L7 5" stroke="#000000" stroke-width="0.8"/></pattern>\n </defs>']
                if self.hatched else [])
        return "\n".join([
            '<?xml version="1.0" encoding="utf-8"?>',
            f'<svg xmlns="http://www.w3.org/2000/svg" version="1.1" width="{w}pt" height="{h}pt" '
            f'viewBox="0 0 {w} {h}">',
            *defs,
            f' <rect class="background" x="0" y="0" width="{w}" height="{h}" fill="#ffffff"/>',
            f' <g font-family="{FONT_STACK}" stroke-linecap="butt" stroke-linejoin="round">',
            *body,
            " </g>",
            "</svg>",
        ]) + "\n"

    def _panel(self, panel: Panel, box: _Box, last: bool) -> list[str]:
        def px(v: float) -> float:
            return box.left + self.p.x.share(v) * (box.right - box.left)

        def py(v: float) -> float:
            return box.bottom - panel.y.share(v) * (box.bottom - box.top)

        out = ['  <g class="panel">']
        for mark in panel.marks:
            out += self._mark(mark, px, py, box, panel.y)
        # axes last, over the marks, as the left and bottom edges of the panel
        out.append(f'   <path class="axis" d="M{number(box.left)} {number(box.top)}V{number(box.bottom)}'
                   f'H{number(box.right)}" fill="none" stroke="#000000" stroke-width="0.8"/>')
        for value, label in zip(self.p.x.ticks, self.p.x.labels):
            x = number(px(value))
            out.append(f'   <path class="tick" d="M{x} {number(box.bottom)}v{number(TICK)}" stroke="#000000" '
                       f'stroke-width="0.8"/>')
            if last:
                out.append(self._text(label, px(value), box.bottom + TICK + TICK_PAD + 0.8 * self.p.x.label_size,
                                      self.p.x.label_size, "middle", "tick-label"))
        for value, label in zip(panel.y.ticks, panel.y.labels):
            y = py(value)
            out.append(f'   <path class="tick" d="M{number(box.left)} {number(y)}h-{number(TICK)}" stroke="#000000" '
                       f'stroke-width="0.8"/>')
            out.append(self._text(label, box.left - TICK - TICK_PAD, y + 0.35 * panel.y.label_size,
                                  panel.y.label_size, "end", "tick-label"))
        if last and self.p.x.title:
            lines = max((len(t.split("\n")) for t in self.p.x.labels), default=1)
            y = box.bottom + TICK + TICK_PAD + lines * LINE_EM * self.p.x.label_size + 0.9 * TEXT_SIZE + 2.0
            out.append(self._text(self.p.x.title, (box.left + box.right) / 2, y, TEXT_SIZE, "middle", "axis-title"))
        if panel.y.title:
            tx, ty = number(EDGE + 0.8 * TEXT_SIZE), number((box.top + box.bottom) / 2)
            out.append(f'   <text class="axis-title" x="{tx}" y="{ty}" font-size="{number(TEXT_SIZE)}" '
                       f'text-anchor="middle" fill="#000000" transform="rotate(-90 {tx} {ty})">'
                       f"{escape(panel.y.title)}</text>")
        out.append("  </g>")
        return out

    @staticmethod
    def _text(text: str, x: float, y: float, size: float, anchor: str, name: str) -> str:
        lines = str(text).split("\n")
        head = (f'   <text class="{name}" x="{number(x)}" y="{number(y)}" font-size="{number(size)}" '
                f'text-anchor="{anchor}" fill="#000000">')
        if len(lines) == 1:
            return f"{head}{escape(text)}</text>"
        spans = "".join(f'<tspan x="{number(x)}" dy="{number(0 if k == 0 else LINE_EM * size)}">{escape(line)}</tspan>'
                        for k, line in enumerate(lines))
        return f"{head}{spans}</text>"

    def _mark(self, mark: Mark, px: Callable[[float], float], py: Callable[[float], float], box: _Box,
              y_axis: Axis) -> list[str]:
        out = [f'   <g class="{escape(mark.name)}">']
        if isinstance(mark, Bars):
            base = py(max(0.0, y_axis.low))  # bars stand on 0, or on the axis when it starts above 0
            for left, right, height in zip(mark.edges[:-1], mark.edges[1:], mark.heights):
                if height > 0:
                    out.append("    " + self._rect(px(left), py(height), px(right), base, mark.fill))
        elif isinstance(mark, Area):
            out.append("    " + self._rect(px(mark.x0), py(mark.y1), px(mark.x1), py(mark.y0), mark.fill))
        elif isinstance(mark, Segments):
            d = "".join(f"M{number(px(a))} {number(py(b))}L{number(px(c))} {number(py(e))}"
                        for a, b, c, e in mark.segments)
            out.append(f'    <path d="{d}" {mark.pen.attributes()}/>')
        elif isinstance(mark, Rule):
            if mark.vertical:
                d = f"M{number(px(mark.at))} {number(box.bottom)}V{number(box.top)}"
            else:
                d = f"M{number(box.left)} {number(py(mark.at))}H{number(box.right)}"
            out.append(f'    <path d="{d}" {mark.pen.attributes()}/>')
        else:
            points = [(px(x), py(y)) for x, y in zip(mark.xs, mark.ys)]
            if mark.pen is not None and len(points) > 1:
                d = "M" + "L".join(f"{number(x)} {number(y)}" for x, y in points)
                out.append(f'    <path d="{d}" {mark.pen.attributes()}/>')
            if mark.marker is not None:
                out += ["    " + marker_path(mark.marker, x, y) for x, y in points]
        out.append("   </g>")
        return out

    def _rect(self, x0: float, y0: float, x1: float, y1: float, fill: Fill) -> str:
        x, y = min(x0, x1), min(y0, y1)
        geometry = f'x="{number(x)}" y="{number(y)}" width="{number(abs(x1 - x0))}" height="{number(abs(y1 - y0))}"'
        opacity = f' fill-opacity="{number(fill.opacity)}"' if fill.opacity != 1.0 else ""
        edge = (f' stroke="{fill.edge.colour}" stroke-width="{number(fill.edge.width)}"' if fill.edge else "")
        rect = f'<rect {geometry} fill="{fill.colour}"{opacity}{edge}/>'
        if fill.hatch:
            self.hatched = True
            rect += f'<rect {geometry} fill="url(#hatch)"/>'
        return rect

    def _key(self, box: _Box) -> list[str]:
        if not self.p.keys:
            return []
        out = ['  <g class="key">']
        row_height = 1.6 * KEY_SIZE
        for k, key in enumerate(self.p.keys):
            row, column = divmod(k, self.columns)
            x = box.left + sum(self.column_widths[:column])
            y = EDGE + row * row_height + 0.5 * row_height  # the sample's middle
            if key.fill is not None:
                out.append("   " + self._rect(x, y - 0.35 * KEY_SIZE, x + HANDLE, y + 0.35 * KEY_SIZE, key.fill))
            if key.pen is not None:
                out.append(f'   <path d="M{number(x)} {number(y)}h{number(HANDLE)}" {key.pen.attributes()}/>')
            if key.marker is not None:
                out.append("   " + marker_path(key.marker, x + HANDLE / 2, y))
            out.append(self._text(key.label, x + HANDLE + 0.6 * KEY_SIZE, y + 0.35 * KEY_SIZE, KEY_SIZE, "start",
                                  "key-label"))
        out.append("  </g>")
        return out


def marker_path(marker: Marker, x: float, y: float) -> str:
    """One marker centred on (x, y) as a path."""
    r = marker.size / 2
    n = number
    shapes = {
        "o": f"M{n(x - r)} {n(y)}a{n(r)} {n(r)} 0 1 0 {n(2 * r)} 0a{n(r)} {n(r)} 0 1 0 {n(-2 * r)} 0Z",
        "s": f"M{n(x - r)} {n(y - r)}h{n(2 * r)}v{n(2 * r)}h{n(-2 * r)}Z",
        "^": f"M{n(x)} {n(y - r)}L{n(x + r)} {n(y + r)}H{n(x - r)}Z",
        "v": f"M{n(x)} {n(y + r)}L{n(x + r)} {n(y - r)}H{n(x - r)}Z",
        "|": f"M{n(x)} {n(y - r)}V{n(y + r)}",
        "_": f"M{n(x - r)} {n(y)}H{n(x + r)}",
        "x": f"M{n(x - r)} {n(y - r)}L{n(x + r)} {n(y + r)}M{n(x - r)} {n(y + r)}L{n(x + r)} {n(y - r)}",
        "+": f"M{n(x - r)} {n(y)}H{n(x + r)}M{n(x)} {n(y - r)}V{n(y + r)}",
        "y": f"M{n(x)} {n(y)}V{n(y + r)}M{n(x)} {n(y)}L{n(x - 0.87 * r)} {n(y - 0.5 * r)}"
             f"M{n(x)} {n(y)}L{n(x + 0.87 * r)} {n(y - 0.5 * r)}",
    }
    d = shapes[marker.shape]
    if marker.shape in "os^v":
        face = "#ffffff" if marker.hollow else marker.colour
        return f'<path class="marker" d="{d}" fill="{face}" stroke="{marker.colour}" stroke-width="1"/>'
    return f'<path class="marker" d="{d}" fill="none" stroke="{marker.colour}" stroke-width="1.2"/>'

