"""The results dataset: the record's numbers as one flat table, for pooling runs and loading them
into another program (`results.csv` and `results.parquet`).

One row per analysis × quantity, built from the record alone (never from the engines), so it can
say nothing the record does not. Quantities: `estimate`, `standard_error`, `bias`, `interval`
(one row per interval: `lower`, `upper`, `interval_method`, `level`, `side`, `prespecified`),
`p_value`, `p_value_adjusted` (one row per adjustment: `adjustment`) and `decision` (one row when the
analysis has a pre-specified rule: `decision_rule`, its threshold(s) and `verdict`). Every row carries
the run id, the plan's id and hash, the analysis's estimand, dataset and that file's hash, `n` (the rows
the analysis used) and, last, `rehearsal` (true for a rehearsal's record: dummy data, never a result).
"""

from __future__ import annotations

import csv
import io
from typing import Any

from planrunner.data.parquet import Kind, ParquetColumn, parquet_bytes
from planrunner.record.rehearsal import is_rehearsal

# the columns, in order, with their type and meaning (README, "Results dataset"; tests/test_results.py)
COLUMNS: tuple[tuple[str, Kind, str], ...] = (
    ("run_id", "string", "the run's id (record run_id)"),
    ("plan_id", "string", "the plan's id"),
    ("plan_sha256", "string", "SHA-256 of the plan file as read"),
    ("analysis", "string", "the analysis id"),
    ("role", "string", "primary, secondary, sensitivity or supplementary"),
    ("estimand", "string", "the estimand the analysis targets, empty without one"),
    ("data", "string", "the dataset the analysis uses"),
    ("data_sha256", "string", "SHA-256 of that data file"),
    ("set", "string", "the analysis set, empty without one"),
    ("method", "string", "bootstrap, permutation, jackknife"),
    ("statistic", "string", "the statistic's name"),
    ("quantity", "string", "estimate, standard_error, bias, interval, p_value, p_value_adjusted or decision"),
    ("value", "double", "the number (empty for an interval or a decision, or where the record holds null)"),
    ("lower", "double", "an interval's lower end (empty when open)"),
    ("upper", "double", "an interval's upper end (empty when open)"),
    ("interval_method", "string", "an interval's method (percentile, bca, ..., shift)"),
    ("level", "double", "an interval's confidence level"),
    ("side", "string", "an interval's side: two-sided, lower or upper"),
    ("prespecified", "bool", "an interval: true for the pre-specified one (listed first), false if supplementary"),
    ("adjustment", "string", "the multiplicity method of an adjusted p-value"),
    ("alternative", "string", "a p-value's alternative"),
    ("decision_rule", "string",
     "a decision's rule: superiority, non-inferiority, equivalence, below-limit or above-limit"),
    ("margin", "double", "a superiority or non-inferiority decision's margin"),
    ("limit", "double", "a below-limit or above-limit decision's limit"),
    ("lower_limit", "double", "an equivalence decision's lower limit"),
    ("upper_limit", "double", "an equivalence decision's upper limit"),
    ("verdict", "string", "a decision's verdict: met, not met or unresolved"),
    ("monte_carlo_sd", "double", "Monte Carlo standard deviation of the value (empty when exact or not known)"),
    ("lower_monte_carlo_sd", "double", "Monte Carlo standard deviation of an interval's lower end"),
    ("upper_monte_carlo_sd", "double", "Monte Carlo standard deviation of an interval's upper end"),
    # decimal text: an exact count of arrangements can exceed any 64-bit integer
    ("resamples", "string", "resamples or arrangements behind the analysis, in decimal digits"),
    ("n", "int64", "rows the analysis used"),
    ("rehearsal", "bool", "true on every row of a rehearsal (planrunner rehearse: dummy data, never a result)"),
)
NAMES = tuple(name for name, _, _ in COLUMNS)


def result_rows(record: dict[str, Any]) -> list[dict[str, Any]]:
    """The record's numbers, one dict per analysis × quantity, with every column (None where empty)."""
    hashes = {d["name"]: d["sha256"] for d in record["datasets"]}
    rows: list[dict[str, Any]] = []
    for a in record["analyses"]:
        base = {name: None for name in NAMES} | {
            "run_id": record["run_id"], "plan_id": record["plan"]["id"], "plan_sha256": record["plan"]["sha256"],
            "rehearsal": is_rehearsal(record),
            "analysis": a["id"], "role": a.get("role"), "estimand": a.get("estimand"),
            "data": a.get("data"), "data_sha256": hashes.get(a.get("data")),
            "set": a.get("set"), "method": a["method"], "statistic": a["statistic"],
            "resamples": None if a.get("resamples") is None else str(a["resamples"]),
            "n": sum((a.get("n") or {}).get("groups", {}).values()) or None}
        carlo = a.get("monte_carlo") or {}
        for quantity, sd in (("estimate", None), ("standard_error", carlo.get("standard_error_sd")),
                             ("bias", carlo.get("bias_sd"))):
            if a.get(quantity) is not None:
                rows.append(base | {"quantity": quantity, "value": a[quantity], "monte_carlo_sd": sd})
        bands = {b.get("method"): b for b in carlo.get("intervals", [])}
        for interval in a.get("intervals", []):
            band = bands.get(interval["method"], {})
            rows.append(base | {"quantity": "interval", "lower": interval.get("lower"), "upper": interval.get("upper"),
                                "interval_method": interval["method"], "level": interval.get("level"),
                                "side": interval.get("side", "two-sided"),
                                "prespecified": interval.get("prespecified"),
                                "lower_monte_carlo_sd": band.get("lower_sd"),
                                "upper_monte_carlo_sd": band.get("upper_sd")})
        if a.get("p_value") is not None:
            rows.append(base | {"quantity": "p_value", "value": a["p_value"], "alternative": a.get("alternative"),
                                "monte_carlo_sd": carlo.get("p_value_sd")})
        for adjusted in a.get("adjusted_p_values", []):
            rows.append(base | {"quantity": "p_value_adjusted", "value": adjusted["p_value"],
                                "adjustment": adjusted["method"], "alternative": a.get("alternative")})
        decision = a.get("decision")
        if isinstance(decision, dict):
            lower_limit, upper_limit = decision.get("limits") or (None, None)
            rows.append(base | {"quantity": "decision", "decision_rule": decision["rule"],
                                "margin": decision.get("margin"), "limit": decision.get("limit"),
                                "lower_limit": lower_limit, "upper_limit": upper_limit,
                                "verdict": decision.get("verdict")})
    return rows


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value)  # every digit: the text reads back to the same double
    return str(value)


def results_csv(record: dict[str, Any]) -> str:
    """results.csv: a header of the column names, then one line per row (empty cell = no value)."""
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(NAMES)
    for row in result_rows(record):
        writer.writerow([_cell(row[name]) for name in NAMES])
    return out.getvalue()


def results_parquet(record: dict[str, Any]) -> bytes:
    """results.parquet with the typed columns of COLUMNS (every one nullable), written by planrunner's
    own Parquet writer (data/parquet.py); each column's meaning is a key-value pair of the file's
    metadata, `description:COLUMN`."""
    rows = result_rows(record)
    columns = [ParquetColumn(name, kind, [row[name] for row in rows]) for name, kind, _ in COLUMNS]
    return parquet_bytes(columns, {f"description:{name}": meaning for name, _, meaning in COLUMNS})
