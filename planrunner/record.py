"""The record: one JSON document that holds every number of a run and how to reproduce it.

The record is the single source of truth; the HTML and Markdown reports are views of it. Field
names follow the contract in DESIGN.md §4. Non-finite numbers never reach the JSON: they become
null and their path is listed under `nonfinite`.
"""

from __future__ import annotations

import hashlib
import importlib.metadata
import json
import math
import platform
import sys
from typing import Any

import numpy as np

from . import __version__
from .compile import Job
from .engines.streams import DRAW_BLOCK, GENERATOR
from .io import Table
from .multiplicity import METHOD_NAMES, adjust
from .plancheck import LoadedPlan

FORMAT = "planrunner.record/1"
PACKAGES = ("numpy", "scipy", "pandas", "pydantic", "pyyaml", "jinja2")
CAUTION = (
    "These results are computations under the assumptions stated in the plan and in this record "
    "(the resampling scheme, the statistic, the data as read). They are not a decision. Decisions "
    "about patients, products, releases or compliance rest with qualified people and with the "
    "regulations, guidance and procedures that govern them locally."
)
SEED_DERIVATION = (
    "numpy SeedSequence(entropy=root seed, spawn_key=(K, b)) with K the first 8 bytes of "
    "SHA-256(analysis id) read as a big-endian integer and b the index of a block of "
    f"{DRAW_BLOCK} resamples; one {GENERATOR} generator per block"
)


def environment() -> dict[str, Any]:
    packages = {}
    for name in PACKAGES:
        try:
            packages[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            packages[name] = None
    return {"python": sys.version.split()[0], "implementation": platform.python_implementation(),
            "platform": platform.platform(), "machine": platform.machine(),
            "packages": packages, "planrunner": __version__}


def _f(x: Any) -> Any:
    """Plain Python number for JSON (full precision; non-finite handled by `sanitize`)."""
    if x is None:
        return None
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, (int, np.integer)):
        return int(x)
    return float(x)


def _histogram(values: np.ndarray, bins: int) -> dict[str, Any]:
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return {"edges": [], "counts": []}
    lo, hi = float(finite.min()), float(finite.max())
    if lo == hi:
        lo, hi = lo - 0.5, hi + 0.5
    counts, edges = np.histogram(finite, bins=bins, range=(lo, hi))
    return {"edges": [float(e) for e in edges], "counts": [int(c) for c in counts]}


def _distribution(kind: str, values: np.ndarray, bins: int) -> dict[str, Any]:
    values = np.asarray(values, dtype=float)
    return {
        "kind": kind,
        "size": int(values.size),
        "mean": _f(values.mean()) if values.size else None,
        "sd": _f(values.std(ddof=1)) if values.size > 1 else None,
        "min": _f(values.min()) if values.size else None,
        "max": _f(values.max()) if values.size else None,
        # the hash lets anyone holding the full distribution prove it is the one behind the numbers
        "sha256": hashlib.sha256(np.ascontiguousarray(values, dtype="<f8").tobytes()).hexdigest(),
        "histogram": _histogram(values, bins),
    }


def question(analysis: Any, statistic_label: str, unit: str | None) -> str:
    """The analysis in words, e.g. 'foam minus standard: difference in medians of minutes_above_8c'."""
    what = f"{statistic_label} of {analysis.outcome}" + (f" ({unit})" if unit else "")
    if analysis.predictor is not None:
        what = f"{statistic_label} of {analysis.predictor} and {analysis.outcome}"
    if analysis.groups is not None:
        first, second = analysis.groups.compare
        what = f"{first} minus {second} by {analysis.groups.by}: {what}"
    if analysis.strata is not None:
        what += f", within strata of {analysis.strata}"
    return what


def analysis_entry(loaded: LoadedPlan, analysis: Any, job: Job, result: Any) -> dict[str, Any]:
    """One analysis's numbers, with everything needed to re-derive them."""
    plan = loaded.plan
    unit = plan.datasets[analysis.data].columns[analysis.outcome].unit
    entry: dict[str, Any] = {
        "id": analysis.id,
        "title": analysis.title,
        "role": analysis.role,
        "question": question(analysis, job.statistic.label, unit),
        "data": analysis.data,
        "outcome": analysis.outcome,
        "predictor": analysis.predictor,
        "unit": unit,
        "groups": None if analysis.groups is None else {"by": analysis.groups.by,
                                                        "compare": list(analysis.groups.compare)},
        "strata": analysis.strata,
        "method": analysis.method,
        "statistic": job.statistic.name,
        "statistic_label": job.statistic.label,
        "settings": {k: (list(v) if isinstance(v, tuple) else v) for k, v in job.options.items()},
        "stream": job.stream.describe(),
        "n": job.counts(),
        "scheme": result.scheme,
        "warnings": [{"code": w.code, "message": w.message} for w in result.warnings],
        # fields that a method does not produce stay null, so every record has the same shape
        "estimate": None, "standard_error": None, "bias": None, "intervals": [], "p_value": None,
        "adjusted_p_values": [], "alternative": None, "exact": None, "resamples": None, "monte_carlo": {}, "details": {},
        "distribution": None,
    }
    bins = plan.report.bins
    if analysis.method == "bootstrap":
        b = result.resamples
        kurtosis = _kurtosis(result.distribution)
        entry.update(
            estimate=_f(result.estimate), standard_error=_f(result.standard_error), bias=_f(result.bias),
            intervals=[{"method": i.method, "level": _f(i.level), "lower": _f(i.lower),
                        "upper": _f(i.upper), "note": i.note} for i in result.intervals],
            resamples=int(b), exact=False,
            monte_carlo={
                # MC s.d. of a B-replicate SE: SE·sqrt((κ−1)/(4B)) (E&T §19.3); of the bias: SE/√B
                "standard_error_sd": _f(result.standard_error * math.sqrt(max(kurtosis - 1.0, 0.0) / (4 * b)))
                if kurtosis is not None else None,
                "bias_sd": _f(result.standard_error / math.sqrt(b)),
                "kurtosis": _f(kurtosis),
            },
            details={"z0": _f(result.z0), "acceleration": _f(result.acceleration),
                     "conventions": dict(result.conventions)},
            distribution=_distribution("bootstrap replicates", result.distribution, bins),
        )
    elif analysis.method == "permutation":
        m = result.resamples
        p = result.p_value
        entry.update(
            estimate=_f(result.observed), p_value=_f(p), alternative=result.alternative,
            exact=bool(result.exact), resamples=int(m),
            monte_carlo={"p_value_sd": 0.0 if result.exact else _f(math.sqrt(p * (1 - p) / m))},
            details={"observed": _f(result.observed), "count_greater_equal": int(result.count_greater),
                     "count_less_equal": int(result.count_less), "arrangements": int(result.arrangements),
                     "two_sided_rule": result.two_sided_rule, "tolerance": _f(result.tolerance),
                     "p_value_rule": "count / arrangements (exact)" if result.exact
                     else "(count + 1) / (resamples + 1) (Monte Carlo)"},
            distribution=_distribution("permutation null", result.null, bins),
        )
        alpha = 1.0 - plan.defaults.confidence
        sd = entry["monte_carlo"]["p_value_sd"] or 0.0
        if not result.exact and abs(p - alpha) < 2 * sd:
            entry["warnings"].append({"code": "mc-error-straddles-alpha",
                                      "message": f"the p-value {p:.4g} is within two Monte Carlo standard errors "
                                                 f"({sd:.2g}) of alpha = {alpha:g}; more resamples would settle it"})
    else:
        entry.update(
            estimate=_f(result.estimate), standard_error=_f(result.standard_error), bias=_f(result.bias),
            details={"corrected_estimate": _f(result.corrected_estimate)},
            distribution=_distribution("jackknife pseudo-values", np.concatenate(result.pseudo_values), bins),
        )
    return entry


def _kurtosis(values: np.ndarray) -> float | None:
    values = np.asarray(values, dtype=float)
    centred = values - values.mean()
    m2 = float(np.mean(centred ** 2))
    return float(np.mean(centred ** 4) / m2 ** 2) if m2 > 0 else None


def multiplicity_entries(plan: Any, analyses: list[dict[str, Any]]) -> list[dict[str, Any]]:
    by_id = {a["id"]: a for a in analyses}
    out = []
    for fam in plan.multiplicity:
        raw = [by_id[i]["p_value"] for i in fam.family]
        adjusted = adjust([1.0 if p is None else p for p in raw], fam.method)
        out.append({"method": fam.method, "method_label": METHOD_NAMES[fam.method], "family": list(fam.family),
                    "unadjusted": dict(zip(fam.family, raw)), "adjusted": dict(zip(fam.family, adjusted))})
        for i, p_adj in zip(fam.family, adjusted):
            by_id[i]["adjusted_p_values"].append({"method": fam.method, "p_value": p_adj})
    return out


def build_record(loaded: LoadedPlan, tables: dict[str, Table], jobs: list[Job], results: list[Any], *,
                 run_id: str, started_utc: str, finished_utc: str, operator: str, command: list[str],
                 execution: dict[str, Any] | None = None) -> dict:
    plan = loaded.plan
    analyses = [analysis_entry(loaded, a, j, r) for a, j, r in zip(plan.analyses, jobs, results)]
    record = {
        "format": FORMAT,
        "run_id": run_id,
        "started_utc": started_utc,
        "finished_utc": finished_utc,
        "operator": operator,
        "command": list(command),
        "plan": {"id": plan.plan, "title": plan.title, "description": plan.description,
                 "file": loaded.file.name, "sha256": loaded.sha256, "text": loaded.text, "lock": None},
        "datasets": [{"name": t.name, "file": t.file, "sha256": t.sha256, "bytes": t.bytes,
                      "rows_read": t.rows_read, "rows_used": t.rows_used,
                      "excluded": [{"reason": e.reason, "rows": e.rows, "first_lines": list(e.lines)}
                                   for e in t.excluded]} for t in tables.values()],
        "environment": environment(),
        "seed": {"root": plan.seed, "generator": GENERATOR, "derivation": SEED_DERIVATION,
                 "draw_block": DRAW_BLOCK},
        "analyses": analyses,
        "multiplicity": multiplicity_entries(plan, analyses),
        "report": {"note": plan.report.note, "bins": plan.report.bins},
        "caution": CAUTION,
        # how the jobs were run (executor, workers); informational, it never changes a number
        "execution": execution or {"executor": "serial", "workers": 1, "scheduler": None},
    }
    return sanitize(record)


def sanitize(record: dict) -> dict:
    """Replace NaN/inf by null and list where that happened (JSON has no such numbers)."""
    flagged: list[str] = []

    def walk(value: Any, path: str) -> Any:
        if isinstance(value, dict):
            return {k: walk(v, f"{path}.{k}" if path else k) for k, v in value.items()}
        if isinstance(value, list):
            return [walk(v, f"{path}[{i}]") for i, v in enumerate(value)]
        if isinstance(value, float) and not math.isfinite(value):
            flagged.append(path)
            return None
        return value

    clean = walk(record, "")
    clean["nonfinite"] = flagged
    return clean


def to_json(record: dict) -> str:
    """Canonical text: sorted keys, full-precision floats (repr round-trips), no NaN."""
    return json.dumps(record, sort_keys=True, indent=2, ensure_ascii=False, allow_nan=False) + "\n"
