"""JSON Schemas of the plan and of the record, for editors and for tools outside planrunner.

The plan's schema is generated from the pydantic models, so it cannot drift from what `check`
accepts (cross-references such as "this level is declared" are beyond JSON Schema and are left to
`planrunner check`). The record's schema is written out here and versioned with the record's
`format`; tests validate real records against it.
"""

from __future__ import annotations

from typing import Any

from planrunner.plan.schema import Plan
from planrunner.record.build import FORMAT
from planrunner.record.permutation import JSON_EXACT
from planrunner.record.rehearsal import STAMP as REHEARSAL_STAMP

DRAFT = "https://json-schema.org/draft/2020-12/schema"
PLAN_SCHEMA_ID = "urn:planrunner:schema:plan:1"
RECORD_SCHEMA_ID = "urn:planrunner:schema:record:1"


def plan_schema() -> dict[str, Any]:
    schema = Plan.model_json_schema(mode="validation")
    return {"$schema": DRAFT, "$id": PLAN_SCHEMA_ID,
            "description": "A planrunner analysis plan (YAML). Cross-references are checked by 'planrunner check'.",
            **schema}


_num = {"type": ["number", "null"]}
_str = {"type": ["string", "null"]}
_sha = {"type": "string", "pattern": "^[0-9a-f]{64}$"}
_int0 = {"type": "integer", "minimum": 0}
# a count of arrangements or draws: a JSON integer up to 2**53 - 1 (what every reader keeps exact,
# RFC 7493 section 2.2), an exact integer beyond as its decimal digits (at most 4000), or (a float
# count beyond the exact programme's bound, an integer of more digits) decimal text, 13 significant digits
_count = {"oneOf": [{"type": "integer", "minimum": 0, "maximum": JSON_EXACT},
                    {"type": "string", "pattern": "^[1-9][0-9]{15,3999}$"},
                    {"type": "string", "pattern": "^[0-9]\\.[0-9]{12}e\\+[0-9]+$"},
                    {"type": "null"}]}


def _obj(properties: dict[str, Any], required: list[str] | None = None, extra: bool = True) -> dict[str, Any]:
    out: dict[str, Any] = {"type": "object", "properties": properties,
                           "required": sorted(properties) if required is None else required}
    if not extra:
        out["additionalProperties"] = False
    return out


_warning = _obj({"code": {"type": "string"}, "message": {"type": "string"}})
# side: "two-sided", or a one-sided bound ("lower": upper is null meaning +inf; "upper": lower is null
# meaning -inf); records written before one-sided bounds have no side (two-sided)
_interval = _obj({"method": {"type": "string"},
                  "level": {"type": "number", "exclusiveMinimum": 0, "exclusiveMaximum": 1},
                  "side": {"enum": ["two-sided", "lower", "upper"]},
                  "lower": _num, "upper": _num, "note": _str, "prespecified": {"type": "boolean"}},
                 required=["method", "level", "lower", "upper", "prespecified"])
_text = {"type": "string", "minLength": 1}
_estimand = _obj({"population": _text, "treatment": _text, "endpoint": _text, "summary": _text,
                  "intercurrent_events": {"type": "array", "items": _obj({
                      "event": _text,
                      "strategy": {"enum": ["treatment policy", "hypothetical", "composite variable",
                                            "while on treatment", "principal stratum"]}})}})
_analysis = _obj({
    "id": {"type": "string"}, "title": _str, "role": {"type": "string"}, "estimand": _str,
    "question": {"type": "string"},
    "data": {"type": "string"}, "set": {"type": "string"}, "outcome": {"type": "string"}, "unit": _str,
    "groups": {"type": ["object", "null"]}, "strata": _str,
    "method": {"enum": ["bootstrap", "permutation", "jackknife"]}, "scheme": {"type": "string"},
    "statistic": {"type": "string"}, "statistic_label": {"type": "string"},
    "settings": {"type": "object"}, "stream": {"type": "object"},
    "n": _obj({"groups": {"type": "object", "additionalProperties": _int0}}, required=["groups"]),
    "estimate": _num, "standard_error": _num, "bias": _num,
    "intervals": {"type": "array", "items": _interval},
    "p_value": {"type": ["number", "null"], "exclusiveMinimum": 0, "maximum": 1},
    "adjusted_p_values": {"type": "array", "items": _obj({"method": {"type": "string"},
                                                          "p_value": {"type": "number", "minimum": 0, "maximum": 1}})},
    "alternative": _str, "exact": {"type": ["boolean", "null"]},
    "resamples": {"oneOf": [{"type": "null"}, {"type": "integer", "minimum": 1, "maximum": JSON_EXACT},
                            {"type": "string", "pattern": "^[1-9][0-9]{15,3999}$"}]},
    "monte_carlo": {"type": "object"},
    "details": {"type": "object", "properties": {
        "count_greater_equal": _count, "count_less_equal": _count, "count_absolute": _count, "arrangements": _count,
        "counts_exact": {"type": "boolean"}}},
    "distribution": {"oneOf": [{"type": "null"}, _obj({
        "support": {"oneOf": [{"type": "null"}, _obj({
            "values": {"type": "array", "items": {"type": "number"}, "maxItems": 100},
            "probabilities": {"type": "array", "items": {"type": "number", "minimum": 0, "maximum": 1}}})]},
    }, required=[])]},
    "warnings": {"type": "array", "items": _warning},
    "descriptives": _obj({"quartiles": {"type": "string"}, "rows": {"type": "array", "items": _obj({
        "variable": {"type": "string"}, "group": {"type": "string"}, "stratum": _str,
        "n": _int0, "clusters": {"type": ["integer", "null"], "minimum": 0},
        **{k: _num for k in ("mean", "sd", "median", "q1", "q3", "min", "max", "proportion")},
        "events": {"type": ["integer", "null"], "minimum": 0},
        "missing": {"type": ["integer", "null"], "minimum": 0}, "excluded": {"type": ["integer", "null"], "minimum": 0},
    })}}),
    "precision": {"oneOf": [{"type": "null"}, _obj({
        "rule": {"type": "string"}, "parameters": {"type": "object"},
        "resamples_used": _int0,
        "stopped_because": {"type": "string"},
        "decisions": {"type": "array", "items": _obj({
            "level": {"type": "number"}, "decision": {"enum": ["rejected", "not rejected", "unresolved"]},
            "resamples": {"type": ["integer", "null"]}, "is_alpha": {"type": "boolean"}})},
        "achieved": {"type": "object"}})]},
    "decision": {"oneOf": [{"type": "null"}, _obj({
        "rule": {"enum": ["superiority", "non-inferiority", "equivalence", "below-limit", "above-limit"]},
        "margin": _num, "limit": _num,
        "limits": {"oneOf": [{"type": "null"}, {"type": "array", "items": {"type": "number"}, "minItems": 2,
                                                 "maxItems": 2}]},
        "benefit": {"enum": ["greater", "less", None]},
        "alpha": {"type": "number", "exclusiveMinimum": 0, "exclusiveMaximum": 1},
        "compared": _obj({"quantity": {"type": "string"}, "value": {}}, required=["quantity", "value"]),
        "verdict": {"enum": ["met", "not met", "unresolved"]},
        "reason": {"type": "string"},
        "resamples_to_resolve": {"type": ["integer", "null"], "minimum": 1}})]},
}, required=["id", "role", "estimand", "method", "scheme", "statistic", "estimate", "standard_error", "bias",
             "intervals", "p_value", "alternative", "exact", "resamples", "n", "warnings", "settings", "stream"])
_lock = {"oneOf": [{"type": "null"}, _obj({
    "file": {"type": "string"}, "sha256": _sha, "canonical_sha256": _sha, "locked_utc": {"type": "string"},
    "operator": {"type": "string"}, "note": _str,
    "deviations": {"type": "array", "items": _obj({"path": {"type": "string"}, "locked": {}, "now": {}})},
}, required=["file", "sha256", "canonical_sha256", "locked_utc", "operator", "note", "deviations"])]}


# a rehearsal's record only (planrunner rehearse): what was dummied, enough to make the same files again
_rehearsal = _obj({
    "stamp": {"const": REHEARSAL_STAMP}, "seed": _int0, "units": {"type": "integer", "minimum": 1},
    "generator": {"type": "string"}, "rules": {"type": "string"}, "stream": {"type": "string"},
    "folder": {"type": "string"},
    "datasets": {"type": "array", "minItems": 1, "items": _obj({
        "name": {"type": "string"}, "file": {"type": "string"}, "sha256": _sha, "rows": _int0, "units": _int0,
        "columns": {"type": "object", "additionalProperties": {"type": "string"}}})}})


def record_schema() -> dict[str, Any]:
    return {
        "$schema": DRAFT, "$id": RECORD_SCHEMA_ID, "title": f"planrunner record ({FORMAT})",
        "description": "record.json as written by 'planrunner run'; the schema's version follows the record's format.",
        **_obj({
            "format": {"const": FORMAT},
            "run_id": {"type": "string"}, "started_utc": {"type": "string"}, "finished_utc": {"type": "string"},
            "operator": {"type": "string"}, "command": {"type": "array", "items": {"type": "string"}},
            "plan": _obj({"id": {"type": "string"}, "title": {"type": "string"}, "description": _str,
                          "file": {"type": "string"}, "sha256": _sha, "text": {"type": "string"}, "lock": _lock}),
            "parameters": {"type": "object", "additionalProperties": {"type": "string"}},
            "rehearsal": _rehearsal,
            "datasets": {"type": "array", "items": _obj({
                "name": {"type": "string"}, "file": {"type": "string"}, "sha256": _sha, "bytes": _int0,
                "rows_read": _int0, "rows_used": _int0,
                "derived": {"type": "array", "items": _obj({"name": {"type": "string"},
                                                            "expression": {"type": "string"},
                                                            "type": {"enum": ["number", "boolean"]}},
                                                           required=["name", "expression", "type"])},
                "format": {"enum": ["csv", "tsv", "xpt", "dataset-json", "parquet", "xlsx"]},
                "sets": {"type": "array", "items": _obj({
                    "name": {"type": "string"}, "condition": {"type": "string"}, "rows": _int0,
                    "excluded": _obj({"reason": {"type": "string"}, "rows": _int0,
                                      "first_lines": {"type": "array", "items": _int0}})})},
                "dictionary": {"type": "array", "items": _obj({
                    "column": {"type": "string"}, "label": _str, "display_format": _str,
                    "stored_as": {"type": "string"}})},
                "excluded": {"type": "array", "items": _obj({"reason": {"type": "string"}, "rows": _int0},
                                                            required=["reason", "rows"])}},
                required=["name", "file", "format", "dictionary", "sha256", "bytes", "rows_read", "rows_used",
                          "excluded"])},
            "environment": _obj({"python": {"type": "string"}, "platform": {"type": "string"},
                                 "packages": {"type": "object", "additionalProperties": _str},
                                 "planrunner": {"type": "string"}}),
            "seed": _obj({"root": _int0, "generator": {"type": "string"}, "derivation": {"type": "string"},
                          "draw_block": {"type": "integer", "minimum": 1}}),
            "estimands": {"type": "object", "additionalProperties": _estimand},
            "analyses": {"type": "array", "items": _analysis, "minItems": 1},
            "multiplicity": {"type": "array", "items": _obj({"method": {"type": "string"},
                                                             "family": {"type": "array", "items": {"type": "string"}},
                                                             "unadjusted": {"type": "object"},
                                                             "adjusted": {"type": "object"}},
                                                            required=["method", "family", "unadjusted", "adjusted"])},
            "methods_text": {"type": "string"},
            "caution": {"type": "string"},
            "nonfinite": {"type": "array", "items": {"type": "string"}},
            "record_sha256": _sha,
        }, required=["format", "run_id", "started_utc", "finished_utc", "operator", "command", "plan",
                     "parameters", "estimands", "datasets", "environment", "seed", "analyses", "multiplicity",
                     "methods_text", "caution", "nonfinite", "record_sha256"]),
    }
