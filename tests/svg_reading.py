"""Reading planrunner's SVG pictures back with xml.etree, for tests: the marks by class name, and the
linear map from data values to points recovered from the tick marks and their labels (so a test
checks positions against the record's numbers, not against the writer's own arithmetic)."""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET

SVG = "{http://www.w3.org/2000/svg}"
ROUNDING = 0.005  # the writer rounds every coordinate to 2 decimals


def parse(svg: str) -> ET.Element:
    return ET.fromstring(svg.encode("utf-8"))


def number_of(label: str) -> float:
    return float(label.replace("\u2212", "-"))


def tick_maps(root: ET.Element, panel: int = 0) -> tuple[list[tuple[float, float]], list[tuple[float, float]]]:
    """(value, position) of the x ticks (of the last panel, which carries the labels) and of the
    y ticks of ``panel``: each tick path is followed by its label."""
    panels = [g for g in root.iter(f"{SVG}g") if g.get("class") == "panel"]

    def pairs(group: ET.Element, direction: str) -> list[tuple[float, float]]:
        children = list(group)
        out = []
        for k, child in enumerate(children):
            d = child.get("d") or ""
            if child.get("class") == "tick" and d.endswith(direction) and k + 1 < len(children):
                label = children[k + 1]
                if label.get("class") == "tick-label":
                    x, y = (float(v) for v in re.match(r"M(\S+) (\S+?)[vh]", d).groups())
                    out.append((number_of(label.text or ""), x if direction.startswith("v") else y))
        return out

    return pairs(panels[-1], "v3.5"), pairs(panels[panel], "h-3.5")


def linear(pairs: list[tuple[float, float]]):
    """The map value → position through the first and last tick."""
    (v0, p0), (v1, p1) = pairs[0], pairs[-1]
    return lambda v: p0 + (v - v0) * (p1 - p0) / (v1 - v0)


def marks(root: ET.Element, name: str) -> list[ET.Element]:
    """The drawn elements inside every group of class ``name``."""
    return [child for g in root.iter(f"{SVG}g") if g.get("class") == name for child in g]


def path_points(d: str) -> list[tuple[float, float]]:
    """The points of an M/L path (absolute coordinates)."""
    return [(float(x), float(y)) for x, y in re.findall(r"[ML](-?[\d.]+) (-?[\d.]+)", d)]
