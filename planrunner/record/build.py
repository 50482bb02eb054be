"""The record: one JSON document that holds every number of a run and how to reproduce it.

The record is the single source of truth; the HTML and Markdown reports are views of it. Field
names follow the contract in the README (The record). Non-finite numbers never reach the JSON: they become
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

from planrunner import __version__
from planrunner.compile.jobs import Job
from planrunner.engines.bootstrap import BootstrapOptions
from planrunner.engines.streams import DRAW_BLOCK, GENERATOR
from planrunner.data.tables import Table
from planrunner.record.bands import RULE as MC_INTERVAL_RULE, interval_bands
from planrunner.engines.multiplicity import METHOD_NAMES, adjust
from planrunner.execute.families import max_t_families
from planrunner.record.permutation import family_floor_warnings, permutation_fields
from planrunner.plan.load import LoadedPlan
from planrunner.record.canonical import plain_number as _f

FORMAT = "planrunner.record/1"
PACKAGES = ("numpy", "scipy", "pandas", "pydantic", "pyyaml", "jinja2", "matplotlib")
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


def _histogram(values: np.ndarray, bins: int) -> dict[str, Any]:
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return {"edges": [], "counts": []}
    lo, hi = float(finite.min()), float(finite.max())
    if lo == hi:
        lo, hi = lo - 0.5, hi + 0.5
    counts, edges = np.histogram(finite, bins=bins, range=(lo, hi))
    return {"edges": [float(e) for e in edges], "counts": [int(c) for c in counts]}


def _jsonable(value: Any) -> Any:
    """Engine details (dicts, lists, tuples, numpy numbers) as plain JSON values."""
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, (str, type(None))):
        return value
    return _f(value)


def _distribution(kind: str, values: np.ndarray, bins: int, weights: np.ndarray | None = None) -> dict[str, Any]:
    values = np.asarray(values, dtype=float)
    if weights is not None:
        # exhaustive enumeration: every distinct resample once, with its probability
        mean = float(np.sum(weights * values))
        out = _distribution(kind, values, bins)
        counts, edges = np.histogram(values, bins=len(out["histogram"]["counts"]) or 1,
                                     range=(out["histogram"]["edges"][0], out["histogram"]["edges"][-1]),
                                     weights=weights)
        out.update(kind=f"{kind} (every distinct resample, weighted by its probability)", mean=mean,
                   sd=math.sqrt(float(np.sum(weights * (values - mean) ** 2))),
                   weights_sha256=hashlib.sha256(np.ascontiguousarray(weights, dtype="<f8").tobytes()).hexdigest(),
                   histogram={"edges": out["histogram"]["edges"], "probabilities": [float(c) for c in counts],
                              "counts": [int(round(c * values.size)) for c in counts]})
        return out
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
    if analysis.groups is not None and len(analysis.groups.compare) == 2:
        first, second = analysis.groups.compare
        what = f"{first} minus {second} by {analysis.groups.by}: {what}"
    elif analysis.groups is not None:
        what = f"{', '.join(analysis.groups.compare)} by {analysis.groups.by}: {what}"
    if analysis.strata is not None:
        what += f", within strata of {analysis.strata}"
    for key, words in (("pairs", "paired by"), ("clusters", "clusters of"), ("covariates", "adjusted for")):
        value = getattr(analysis, key, None)
        if value:
            what += f", {words} {', '.join(value) if isinstance(value, list) else value}"
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
        "settings": job.settings(),
        "stream": job.stream.describe(),
        "n": job.counts(),
        "scheme": result.scheme,
        "warnings": [{"code": w.code, "message": w.message} for w in (*job.warnings, *result.warnings)],
        "statistic_parameter": None if job.statistic.parameter is None
        else {job.statistic.parameter: job.statistic.value},
        "design": {"pairs": analysis.pairs, "clusters": analysis.clusters, "order": analysis.order},
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
                        "upper": _f(i.upper), "note": i.note,
                        "quantile_levels": None if i.quantile_levels is None else [_f(v) for v in i.quantile_levels],
                        # about 95% Monte Carlo ranges of each endpoint (null when exact or undefined)
                        "monte_carlo": None if i.monte_carlo is None else
                        {"lower": [_f(v) for v in i.monte_carlo[0]], "upper": [_f(v) for v in i.monte_carlo[1]]}}
                       for i in result.intervals],
            resamples=int(b), exact=bool(result.exact),
            monte_carlo={
                # MC s.d. of a B-replicate SE: SE·sqrt((κ−1)/(4B)) (V-TOL); of the bias: SE/√B
                "standard_error_sd": _f(result.standard_error_sd),
                "bias_sd": _f(result.bias_sd),
                "kurtosis": _f(kurtosis),
            },
            details={"z0": _f(result.z0), "acceleration": _f(result.acceleration),
                     "conventions": dict(result.conventions), **_jsonable(result.details)},
            distribution=_distribution("bootstrap replicates", result.distribution, bins, result.weights),
        )
        if isinstance(job.options, BootstrapOptions) and job.options.save_distribution:
            # every replicate in resample order; its SHA-256 (of little-endian doubles) is `sha256`
            entry["distribution"]["values"] = [float(v) for v in result.distribution]
            if result.weights is not None:
                entry["distribution"]["weights"] = [float(v) for v in result.weights]
        # Monte Carlo band and s.d. of each interval endpoint (planrunner/mcerror.py)
        entry["monte_carlo"]["intervals"] = interval_bands(result.distribution, result.estimate, result.intervals)
        entry["monte_carlo"]["interval_rule"] = MC_INTERVAL_RULE
    elif analysis.method == "permutation":
        entry.update(permutation_fields(result, bins))
    else:
        entry.update(
            estimate=_f(result.estimate), standard_error=_f(result.standard_error), bias=_f(result.bias),
            details={"corrected_estimate": _f(result.corrected_estimate), "units": [int(k) for k in result.n]},
            distribution=_distribution("jackknife pseudo-values", np.concatenate(result.pseudo_values), bins),
        )
    return entry


def _kurtosis(values: np.ndarray) -> float | None:
    values = np.asarray(values, dtype=float)
    centred = values - values.mean()
    m2 = float(np.mean(centred ** 2))
    return float(np.mean(centred ** 4) / m2 ** 2) if m2 > 0 else None


def multiplicity_entries(plan: Any, analyses: list[dict[str, Any]],
                         max_t: dict[int, Any] | None = None) -> list[dict[str, Any]]:
    by_id = {a["id"]: a for a in analyses}
    out = []
    for j, fam in enumerate(plan.multiplicity):
        raw = [by_id[i]["p_value"] for i in fam.family]
        if fam.method == "max-t":
            adjusted = list((max_t or {})[j].adjusted)
        else:
            adjusted = adjust([1.0 if p is None else p for p in raw], fam.method)
        family_floor_warnings(fam, [by_id[i] for i in fam.family], 1.0 - plan.defaults.confidence,
                              (max_t or {}).get(j))
        out.append({"method": fam.method, "method_label": METHOD_NAMES[fam.method], "family": list(fam.family),
                    "unadjusted": dict(zip(fam.family, raw)), "adjusted": dict(zip(fam.family, adjusted))})
        if fam.method == "max-t" and max_t:
            out[-1]["details"] = max_t[j].describe()
        for i, p_adj in zip(fam.family, adjusted):
            by_id[i]["adjusted_p_values"].append({"method": fam.method, "p_value": p_adj})
    return out


def build_record(loaded: LoadedPlan, tables: dict[str, Table], jobs: list[Job], results: list[Any], *,
                 run_id: str, started_utc: str, finished_utc: str, operator: str, command: list[str],
                 max_t: dict[int, Any] | None = None, execution: dict[str, Any] | None = None) -> dict:
    plan = loaded.plan
    analyses = [analysis_entry(loaded, a, j, r) for a, j, r in zip(plan.analyses, jobs, results)]
    if max_t is None and any(f.method == "max-t" for f in plan.multiplicity):
        max_t = max_t_families(plan, jobs)
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
                      "rows_read": t.rows_read, "rows_used": t.rows_used, "ignored_columns": list(t.ignored_columns),
                      "excluded": [{"reason": e.reason, "rows": e.rows, "first_lines": list(e.lines)}
                                   for e in t.excluded]} for t in tables.values()],
        "environment": environment(),
        "seed": {"root": plan.seed, "generator": GENERATOR, "derivation": SEED_DERIVATION,
                 "draw_block": DRAW_BLOCK},
        "analyses": analyses,
        "multiplicity": multiplicity_entries(plan, analyses, max_t),
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
