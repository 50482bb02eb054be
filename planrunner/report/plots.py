"""Pictures of one analysis, drawn with matplotlib as SVG from the record alone.

Every mark drawn is a number already in the record: the histogram of the resampling (or null, or
pseudo-value) distribution, the estimate, the interval endpoints and their Monte Carlo bands, the
counts behind a p-value. Nothing here computes a statistic.

Looks: bars in light grey, marks in the Okabe–Ito colours (distinguishable with the common colour
vision deficiencies) and each mark also told apart by line style or hatching, so a greyscale print
keeps every meaning. No mathtext (`text.parse_math` off), so a `$` in a unit stays a `$`.

Byte stability: a fixed `svg.hashsalt`, no date in the metadata, the font that ships with
matplotlib, and text kept as text (`svg.fonttype: none`); the same record gives the same bytes.
"""

from __future__ import annotations

import io
import math
import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import matplotlib
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from planrunner.engines.statistics import STATISTICS
from planrunner.report import digits as precision

# Okabe & Ito (2008) colours, each paired with a line style so that greyscale keeps them apart
BLUE, GREEN, PURPLE, ORANGE, VERMILLION = "#0072B2", "#009E73", "#CC79A7", "#E69F00", "#D55E00"
INTERVAL_STYLES = [(BLUE, "--"), (GREEN, ":"), (PURPLE, "-."), (ORANGE, (0, (5, 1, 1, 1)))]
BAR, BAR_EDGE = "#d4d4d4", "#7a7a7a"

RC: Any = {  # matplotlib settings of every figure (Any: the stubs type the keys as a closed Literal)
    "svg.hashsalt": "planrunner",
    "svg.fonttype": "none",
    "font.family": "sans-serif",
    "font.sans-serif": ["DejaVu Sans"],
    "font.size": 9.0,
    "text.parse_math": False,
    "text.usetex": False,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "hatch.linewidth": 0.8,
}


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


def _bars(ax: Any, hist: dict[str, Any]) -> int:
    edges, counts = hist["edges"], hist["counts"]
    ax.stairs(counts, edges, fill=True, color=BAR, label="_bars")
    ax.stairs(counts, edges, color=BAR_EDGE, linewidth=0.6)
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))  # counts are whole numbers
    return max(counts) if counts else 0


def _finite(*values: Any) -> list[float]:
    return [float(v) for v in values if isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)]


def _limits(ax: Any, hist: dict[str, Any], *marks: Any) -> None:
    points = _finite(hist["edges"][0], hist["edges"][-1], *marks)
    lo, hi = min(points), max(points)
    pad = (hi - lo) * 0.04 or 0.5
    ax.set_xlim(lo - pad, hi + pad)


def _svg(fig: Figure) -> str:
    buffer = io.StringIO()
    with matplotlib.rc_context(RC):
        fig.savefig(buffer, format="svg", metadata={"Date": None})
    return buffer.getvalue()


def _figure() -> tuple[Figure, Any]:
    with matplotlib.rc_context(RC):
        fig = Figure(figsize=(7.0, 3.0), layout="constrained")
        ax = fig.add_subplot()
    return fig, ax


def _legend(ax: Any) -> None:
    ax.legend(loc="lower left", bbox_to_anchor=(0.0, 1.0), ncol=3, frameon=False, fontsize=8,
              handlelength=2.6, borderaxespad=0.2)


def resampling_plot(entry: dict[str, Any], fmt: Formatter) -> Plot | None:
    """Bootstrap replicates: bars, the estimate, each interval and the Monte Carlo band of its ends."""
    hist = ((entry.get("distribution") or {}).get("histogram") or {})
    if not hist.get("counts"):
        return None
    bands = {b["method"]: b for b in (entry.get("monte_carlo") or {}).get("intervals") or []}
    with matplotlib.rc_context(RC):
        fig, ax = _figure()
        top = _bars(ax, hist)
        estimate = entry.get("estimate")
        marks: list[Any] = [estimate]
        if _finite(estimate):
            ax.axvline(estimate, color="black", linewidth=2.0, label=f"estimate {fmt(estimate)}")
        alt_parts = []
        for k, interval in enumerate(entry.get("intervals") or []):
            colour, style = INTERVAL_STYLES[k % len(INTERVAL_STYLES)]
            lower, upper = interval.get("lower"), interval.get("upper")
            name = f"{interval['method']} {interval['level'] * 100:g}%"
            if not _finite(lower, upper) or len(_finite(lower, upper)) < 2:
                alt_parts.append(f"{name} interval not available")
                continue
            y = top * (1.06 + 0.1 * k)
            ax.plot([lower, upper], [y, y], color=colour, linestyle=style, linewidth=1.6,
                    label=f"{name} interval")
            for end in (lower, upper):
                ax.plot([end, end], [0, y], color=colour, linestyle=style, linewidth=1.0)
            marks += [lower, upper]
            band = bands.get(interval["method"]) or {}
            band_text = []
            for side in ("lower_band", "upper_band"):
                if band.get(side) and len(_finite(*band[side])) == 2:
                    lo, hi = band[side]
                    ax.fill_between([lo, hi], y - top * 0.025, y + top * 0.025, facecolor=colour, alpha=0.35,
                                    edgecolor=colour, linewidth=0.8,
                                    label="Monte Carlo band of the ends" if side == "lower_band" and k == 0 else None)
                    marks += [lo, hi]
                    band_text.append(f"{fmt(lo)} to {fmt(hi)}")
            alt_parts.append(f"{name} interval {fmt(lower)} to {fmt(upper)}"
                             + (f" (Monte Carlo band of the ends: {'; '.join(band_text)})" if band_text else ""))
        _limits(ax, hist, *marks)
        ax.set_ylim(0, top * (1.12 + 0.1 * max(len(entry.get("intervals") or []) - 1, 0)) or 1)
        ax.set_xlabel(axis_label(entry))
        ax.set_ylabel("replicates per bar")
        _legend(ax)
    size = (entry.get("distribution") or {}).get("size")
    alt = (f"Histogram of {size} bootstrap replicates of the {axis_label(entry)}, from {fmt(hist['edges'][0])} "
           f"to {fmt(hist['edges'][-1])}; the estimate {fmt(estimate)} is a solid black line"
           + ("; " + "; ".join(alt_parts) if alt_parts else "") + ".")
    return Plot(f"{entry['id']}-resampling", _svg(fig), alt)


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


def null_plot(entry: dict[str, Any], fmt: Formatter, fmt_p: Formatter) -> Plot | None:
    """Permutation null: bars, the observed statistic and, shaded, the tail that makes the p-value."""
    hist = ((entry.get("distribution") or {}).get("histogram") or {})
    if not hist.get("counts"):
        return None
    observed = entry.get("estimate")
    side = tail_side(entry)
    details = entry.get("details") or {}
    with matplotlib.rc_context(RC):
        fig, ax = _figure()
        top = _bars(ax, hist)
        edges, counts = hist["edges"], hist["counts"]
        if side is not None and _finite(observed):
            # the part of each bar on the counted side of the observed value (bars are cut at it)
            for left, right, c in zip(edges[:-1], edges[1:], counts):
                lo, hi = (max(left, observed), right) if side == "greater" else (left, min(right, observed))
                if c and hi > lo:
                    ax.fill_between([lo, hi], 0, c, facecolor=VERMILLION, alpha=0.55, edgecolor="black",
                                    hatch="////", linewidth=0.0, step=None)
            ax.fill_between([], [], [], facecolor=VERMILLION, alpha=0.55, edgecolor="black", hatch="////",
                            label="tail counted for the p-value"
                            + (" (doubled)" if entry.get("alternative") == "two-sided" else ""))
        if _finite(observed):
            ax.axvline(observed, color="black", linewidth=2.0, label=f"observed {fmt(observed)}")
        _limits(ax, hist, observed)
        ax.set_ylim(0, top * 1.08 or 1)
        ax.set_xlabel(axis_label(entry))
        ax.set_ylabel("share of arrangements per bar" if hist.get("counts_are") == "probability"
                      else "arrangements per bar" if entry.get("exact") else "permutations per bar")
        _legend(ax)
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
    alt = (f"Histogram of the permutation null distribution ({precision.count(size)} {what}) "
           f"of the {axis_label(entry)}, "
           f"from {fmt(edges[0])} to {fmt(edges[-1])}; the observed value {fmt(observed)} is a solid black "
           f"line{tail}.")
    return Plot(f"{entry['id']}-null", _svg(fig), alt)


def pseudo_value_plot(entry: dict[str, Any], fmt: Formatter) -> Plot | None:
    """Jackknife pseudo-values: bars, the estimate and the bias-corrected estimate (their mean)."""
    hist = ((entry.get("distribution") or {}).get("histogram") or {})
    if not hist.get("counts"):
        return None
    estimate = entry.get("estimate")
    corrected = (entry.get("details") or {}).get("corrected_estimate")
    with matplotlib.rc_context(RC):
        fig, ax = _figure()
        top = _bars(ax, hist)
        if _finite(estimate):
            ax.axvline(estimate, color="black", linewidth=2.0, label=f"estimate {fmt(estimate)}")
        if _finite(corrected):
            ax.axvline(corrected, color=BLUE, linewidth=1.6, linestyle="--",
                       label=f"bias-corrected (mean of pseudo-values) {fmt(corrected)}")
        _limits(ax, hist, estimate, corrected)
        ax.set_ylim(0, top * 1.08 or 1)
        ax.set_xlabel(axis_label(entry, "pseudo-value, "))
        ax.set_ylabel("observations per bar")
        _legend(ax)
    size = (entry.get("distribution") or {}).get("size")
    alt = (f"Histogram of the {size} jackknife pseudo-values of the {axis_label(entry)}, from "
           f"{fmt(hist['edges'][0])} to {fmt(hist['edges'][-1])}; the estimate {fmt(estimate)} is a solid "
           f"black line and the bias-corrected estimate {fmt(corrected)} a dashed blue line. Isolated bars "
           f"far from the rest are observations with a large influence on the estimate.")
    return Plot(f"{entry['id']}-pseudo-values", _svg(fig), alt)


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
_METADATA = re.compile(r"\s*<metadata>.*?</metadata>", re.S)


def inline_svg(plot: Plot, prefix: str, html_escape: Callable[[str], str]) -> str:
    """The SVG ready to sit inside an HTML page: no XML prolog or metadata, ids made unique by
    `prefix` (several pictures share one document), and the text alternative as its title."""
    text = _METADATA.sub("", _PROLOG.sub("", plot.svg, count=1), count=1)
    text = re.sub(r'\bid="([^"]+)"', lambda m: f'id="{prefix}{m.group(1)}"', text)
    text = re.sub(r"url\(#([^)]+)\)", lambda m: f"url(#{prefix}{m.group(1)})", text)
    text = re.sub(r'xlink:href="#([^"]+)"', lambda m: f'href="#{prefix}{m.group(1)}"', text)
    text = text.replace(' xmlns:xlink="http://www.w3.org/1999/xlink"', "")
    title = f'<title id="{prefix}title">{html_escape(plot.alt)}</title>'
    return re.sub(r"<svg\b([^>]*)>", lambda m: f'<svg{m.group(1)} role="img" aria-labelledby="{prefix}title">'
                  f"\n {title}", text, count=1).strip() + "\n"


def file_svg(plot: Plot, xml_escape: Callable[[str], str]) -> str:
    """The SVG as a file beside the Markdown report, with its text alternative as its title."""
    title = f"<title>{xml_escape(plot.alt)}</title>"
    return re.sub(r"(<svg\b[^>]*>)", lambda m: f"{m.group(1)}\n {title}", plot.svg, count=1)
