"""HTML and Markdown views of a record.

Templates live in the top-level `templates/` folder (shipped inside the wheel as
`planrunner/templates`). They only format: every number they show is already in the record, printed
to the precision its Monte Carlo error supports (planrunner/precision.py). The pictures are drawn by
planrunner/report/plots.py (through the SVG writer report/canvas.py) from the record alone; the HTML
report embeds them as inline SVG, so it is one self-contained file that opens offline and from an
e-mail attachment, and the Markdown report links to them as SVG files in figures/ beside it.
"""

from __future__ import annotations

import functools
import importlib.resources
import json
import math
import re
from pathlib import Path
from typing import TYPE_CHECKING, Any

from markupsafe import Markup, escape

from planrunner.engines.multiplicity import adjust
from planrunner.engines.statistics import comparison_word
from planrunner.record.rehearsal import STAMP as REHEARSAL_STAMP
from planrunner.record.rehearsal import is_rehearsal
from planrunner.report import digits as precision
from planrunner.report import labels
from planrunner.report.digits import significant

if TYPE_CHECKING:  # jinja2 and the SVG writer are imported only when a report is drawn
    import jinja2

    from planrunner.report import plots


def templates_folder() -> Path:
    """The templates inside an installed wheel, else the repository's top-level folder."""
    packaged = importlib.resources.files("planrunner") / "templates"
    if packaged.is_dir():
        return Path(str(packaged))
    return Path(__file__).resolve().parents[2] / "templates"


def _compiled_templates(directory: str | None = None) -> jinja2.BytecodeCache | None:
    """jinja2's cache of compiled templates between processes (a tenth of a second a run), in its own
    per-user folder (created mode 0700 in the temporary folder and refused when anyone else owns it or
    may write to it). An entry is used only for the very template source it was compiled from (jinja2
    keys it by file and checks the source's checksum and the Python version). Without a safe folder,
    or when an entry cannot be written, templates are compiled as before: never an error of a run."""
    import jinja2

    class QuietCache(jinja2.FileSystemBytecodeCache):
        def dump_bytecode(self, bucket: jinja2.bccache.Bucket) -> None:
            try:
                super().dump_bytecode(bucket)
            except OSError:
                pass

    try:
        return QuietCache(directory, pattern="planrunner-%s.cache")
    except (OSError, RuntimeError):
        return None


def environment(kind: str) -> jinja2.Environment:
    """The jinja2 environment of every page and report of `kind` ('html' escapes, 'md' does not)."""
    return _environment(kind)


@functools.cache  # one environment per kind and process: each template is compiled once per process
def _environment(kind: str) -> jinja2.Environment:
    return new_environment(kind, _compiled_templates())


def new_environment(kind: str, compiled: jinja2.BytecodeCache | None) -> jinja2.Environment:
    """A jinja2 environment of `kind` whose compiled templates come from (and go to) `compiled`."""
    import jinja2

    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(templates_folder())),
        bytecode_cache=compiled,
        autoescape=(kind == "html"),
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )
    env.filters["num"] = number
    env.filters["pvalue"] = pvalue
    env.filters["md"] = markdown_text
    env.filters["code"] = markdown_code
    env.filters["cellcode"] = lambda value: markdown_code(value).replace("|", "\\|")  # GFM table cells
    env.filters["mc"] = precision.with_mc
    env.filters["sd"] = precision.mc_sd
    env.filters["p"] = precision.p_value
    env.filters["plain"] = plain
    env.filters["count"] = precision.count
    env.filters["exactness"] = exactness
    env.filters["compares"] = comparison_word
    env.filters["interval"] = labels.interval_name
    env.filters["interval_status"] = interval_status
    env.filters["rule"] = decision_rule
    env.globals["fence"] = markdown_fence
    env.globals["interval_label"] = labels.interval_label
    env.globals["interval_heading"] = labels.interval_heading
    env.globals["interval_ends"] = interval_ends
    env.globals["interval_mc"] = interval_mc
    return env


# the reports' and the terminal's plain number: 4 significant digits, '—' for a missing one
number = precision.significant


def interval_ends(interval: dict[str, Any], band: dict[str, Any]) -> str:
    """An interval's ends (or a one-sided bound's one end), each to the digits its Monte Carlo s.d. supports."""
    return labels.interval_ends(interval, precision.with_mc(interval.get("lower"), band.get("lower_sd")),
                                precision.with_mc(interval.get("upper"), band.get("upper_sd")))


def interval_mc(interval: dict[str, Any], band: dict[str, Any]) -> dict[str, Any] | None:
    """The Monte Carlo s.d. of the ends that were read ("ends 0.41 and 0.52", or "end 0.41" for a
    one-sided bound) and their bands ("a to b" each); None when exact or undefined."""
    ends = [end for end, key in (("lower", "lower_sd"), ("upper", "upper_sd"))
            if band.get(key) is not None and (labels.one_sided(interval) in (None, end))]
    if not ends:
        return None
    sds = [precision.mc_sd(band[f"{end}_sd"]) for end in ends]
    bands = [f"{significant(band[f'{end}_band'][0])} to {significant(band[f'{end}_band'][1])}"
             for end in ends if band.get(f"{end}_band")]
    return {"sd": ("ends " + " and ".join(sds)) if len(sds) == 2 else f"end {sds[0]}",
            "bands": bands if len(bands) == len(ends) else []}


def pvalue(value: Any) -> str:
    if value is None:
        return "—"
    return f"{value:.4g}" if value >= 1e-4 else f"{value:.2e}"


FIGURES_FOLDER = "figures"

# which number a warning concerns, so the report shows it beside that number; others go above the table
CONCERNS = {
    "bca-non-smooth": "interval:bca", "bca-undefined": "interval:bca", "few-resamples-in-tail": "intervals",
    "mc-error-straddles-alpha": "p_value", "few-arrangements": "p_value",
    "jackknife-non-smooth": "standard_error", "non-finite-replicates": "standard_error",
    "degenerate-distribution": "standard_error", "small-sample": "n", "single-observation-cell": "n",
}


def markdown_text(value: Any) -> str:
    """Text from the plan or data, inert in Markdown: no HTML, links, images, emphasis or code."""
    text = str(value).replace("\r", " ").replace("\n", " ")
    text = "".join("\\" + c if c in "\\`*_[]|~" else c for c in text)
    return text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")


def markdown_code(value: Any) -> str:
    """An inline code span that no backtick inside `value` can close early."""
    text = str(value).replace("\r", " ").replace("\n", " ")
    run = max((len(m) for m in re.findall(r"`+", text)), default=0)
    ticks = "`" * (run + 1)
    pad = " " if text.startswith("`") or text.endswith("`") else ""
    return f"{ticks}{pad}{text}{pad}{ticks}"


def exactness(entry: dict[str, Any]) -> str:
    """How an exact result was obtained, in words."""
    if (entry.get("details") or {}).get("computation") == "dynamic programming":
        return "exact null distribution by dynamic programming: no Monte Carlo error"
    if entry.get("method") == "bootstrap":
        return "every distinct resample enumerated with its probability: no Monte Carlo error"
    return "every arrangement enumerated: no Monte Carlo error"


def interval_status(interval: dict[str, Any]) -> str:
    """'pre-specified' or 'supplementary' (a record from before the flag existed: no label)."""
    flag = interval.get("prespecified")
    return "" if flag is None else "pre-specified" if flag else "supplementary"


VERDICT_CAUTION = ("A verdict is the plan's rule applied to these numbers under the plan's assumptions; it is a "
                   "computation, not a decision (see the caution above).")


def decision_rule(decision: dict[str, Any]) -> str:
    """The rule and its threshold in words, e.g. 'non-inferiority, margin −3 (larger is better)'."""
    rule = decision.get("rule", "")
    if decision.get("limits") is not None:
        low, high = decision["limits"]
        threshold = f"limits {significant(low)} and {significant(high)}"
    elif decision.get("limit") is not None:
        threshold = f"limit {significant(decision['limit'])}"
    else:
        threshold = f"margin {significant(decision.get('margin'))}"
    side = {"greater": " (larger is better)", "less": " (smaller is better)"}.get(decision.get("benefit") or "", "")
    return f"{rule}, {threshold}{side}"


def estimand_groups(record: dict[str, Any]) -> list[dict[str, Any]]:
    """The analyses grouped by the estimand they target, in the plan's order of estimands, then
    those that name none (only when there are any)."""
    estimands = record.get("estimands") or {}
    groups = [{"name": name, "attributes": attributes,
               "analyses": [a for a in record["analyses"] if a.get("estimand") == name]}
              for name, attributes in estimands.items()]
    loose = [a for a in record["analyses"] if a.get("estimand") is None]
    if loose:
        groups.append({"name": None, "attributes": None, "analyses": loose})
    return groups


def markdown_fence(text: str) -> str:
    """A code-fence marker longer than any backtick run in `text` (CommonMark closes on ≥ length)."""
    run = max((len(m) for m in re.findall(r"`+", text)), default=0)
    return "`" * max(3, run + 1)


def plain(value: Any) -> str:
    """A JSON value as compact text (for lock entries and deviations, whose shape varies)."""
    if isinstance(value, (dict, list)):
        return json.dumps(value, sort_keys=True, ensure_ascii=False)
    return "—" if value is None else str(value)


def _analysis_view(index: int, entry: dict[str, Any]) -> dict[str, Any]:
    """What the templates need beyond the record entry: pictures and warnings sorted by concern."""
    from planrunner.report import plots

    figures = []
    for k, plot in enumerate(_plots(json.dumps(entry, sort_keys=True, ensure_ascii=False))):
        figures.append({"name": plot.name, "file": f"{FIGURES_FOLDER}/{plot.name}.svg", "alt": plot.alt,
                        "svg": plot.svg, "inline": Markup(plots.inline_svg(plot, f"f{index}-{k}-", _escape_text))})
    concerns: dict[str, list[dict[str, Any]]] = {}
    interval_methods = {i.get("method") for i in entry.get("intervals") or []}
    for warning in entry.get("warnings") or []:
        where = CONCERNS.get(warning.get("code"), "general")
        if where.startswith("interval:") and where.split(":", 1)[1] not in interval_methods:
            where = "intervals"
        if where == "intervals" and not interval_methods:
            where = "general"
        if where == "p_value" and entry.get("p_value") is None:
            where = "general"
        concerns.setdefault(where, []).append(warning)
    bands = (entry.get("monte_carlo") or {}).get("intervals") or []
    value, what, statistic = labels.effect(entry)
    tables = descriptive_tables(entry)
    return {"figures": figures, "warnings": concerns, "direction": labels.direction(entry),
            "effect": {"value": value, "what": what, "statistic": statistic}, "sizes": labels.group_sizes(entry),
            "bands": [bands[i] if i < len(bands) else {} for i in range(len(entry.get("intervals") or []))],
            "descriptives": tables,
            "precision": labels.precision_line(entry),
            "unresolved": labels.unresolved(entry)}


def descriptive_tables(entry: dict[str, Any]) -> list[dict[str, Any]]:
    """The record's descriptive rows as one table per variable: a 0/1 variable shows events and
    their proportion, another its mean, s.d., median, quartiles and range; the clusters and strata
    columns only when the analysis has them. A record from before `descriptives` existed has none."""
    described = entry.get("descriptives")
    if not isinstance(described, dict):
        return []
    tables: dict[str, dict[str, Any]] = {}
    for row in described.get("rows") or []:
        table = tables.setdefault(str(row.get("variable")), {"variable": row.get("variable"), "rows": [],
                                                             "binary": True, "clusters": False, "strata": False})
        table["rows"].append(row)
        table["binary"] = table["binary"] and row.get("events") is not None
        table["clusters"] = table["clusters"] or row.get("clusters") is not None
        table["strata"] = table["strata"] or row.get("stratum") is not None
    return list(tables.values())


@functools.lru_cache(maxsize=64)
def _plots(entry_json: str) -> tuple[plots.Plot, ...]:
    """The pictures of one record entry; drawing is slow and pure, so the same entry is drawn once."""
    from planrunner.report import plots  # loads only when a report is drawn (not for `check` or `--version`)
    from planrunner.report.kmplot import curve_plot

    entry = json.loads(entry_json)
    curves = curve_plot(entry)  # a censored analysis: its Kaplan–Meier curves first
    return tuple(([curves] if curves is not None else []) + plots.plots_for(entry, significant, precision.p_value))


def _alpha(entry: dict[str, Any] | None) -> Any:
    return labels.alpha(entry or {})


def _adjusted_sds(family: dict[str, Any], by_id: dict[str, dict[str, Any]]) -> list[float | None]:
    """The Monte Carlo s.d. (or rule 5's bound) of each adjusted p-value of a family; None if exact."""
    ids = family["family"]
    if family["method"] == "max-t":  # one proportion of the joint permutations each
        details = family.get("details") or {}
        if details.get("exact", True):
            return [None] * len(ids)
        m = details["resamples"]
        return [math.sqrt(p * (1.0 - p) / m) for p in (family["adjusted"][i] for i in ids)]
    p_values = [1.0 if family["unadjusted"].get(i) is None else family["unadjusted"][i] for i in ids]
    sds = [((by_id.get(i) or {}).get("monte_carlo") or {}).get("p_value_sd") for i in ids]
    return precision.adjusted_sds(family["method"], p_values, sds, adjust)


def _adjusted_view(record: dict[str, Any]) -> dict[str, list[dict[str, Any]]]:
    """Adjusted p-values per analysis, each printed to the precision of rules 5 and 6 (digits.py)."""
    by_id = {a["id"]: a for a in record["analyses"]}
    out: dict[str, list[dict[str, Any]]] = {a["id"]: [] for a in record["analyses"]}
    for family in record.get("multiplicity") or []:
        for i, sd in zip(family["family"], _adjusted_sds(family, by_id)):
            value = family["adjusted"].get(i)
            out.setdefault(i, []).append({"method": family["method"],
                                          "label": family.get("method_label", family["method"]),
                                          "p_value": value,
                                          "text": precision.p_value(value, sd, _alpha(by_id.get(i))),
                                          "sd_bound": sd})
    return out


def _escape_text(text: str) -> str:
    return str(escape(text))


def _context(record: dict[str, Any]) -> dict[str, Any]:
    return {"record": record, "estimand_groups": estimand_groups(record), "verdict_caution": VERDICT_CAUTION,
            "rehearsal_stamp": REHEARSAL_STAMP if is_rehearsal(record) else None,
            "any_decision": any(isinstance(a.get("decision"), dict) and a["decision"].get("verdict")
                                for a in record["analyses"]),
            "views": {a["id"]: _analysis_view(i, a) for i, a in enumerate(record["analyses"])},
            "adjusted": _adjusted_view(record),
            "p_sd": {a["id"]: (a.get("monte_carlo") or {}).get("p_value_sd") for a in record["analyses"]},
            "p_alpha": {a["id"]: _alpha(a) for a in record["analyses"]}}


def _render(context: dict[str, Any], kind: str) -> str:
    template = _environment(kind).get_template("report.html.j2" if kind == "html" else "report.md.j2")
    return template.render(**context)


def render(record: dict[str, Any], kind: str) -> str:
    """The report for `kind` ('html' or 'md') as text; a pure function of the record."""
    return _render(_context(record), kind)


def render_all(record: dict[str, Any]) -> dict[str, str]:
    """Every report file of a run, by path relative to the run folder: report.html, report.md and
    the pictures the Markdown report links to (figures/NAME.svg). The pictures are drawn once."""
    from planrunner.report import plots

    context = _context(record)
    files = {"report.html": _render(context, "html"), "report.md": _render(context, "md")}
    for view in context["views"].values():
        for figure in view["figures"]:
            files[figure["file"]] = plots.file_svg(plots.Plot(figure["name"], figure["svg"], figure["alt"]),
                                                   _escape_text)
    return files
