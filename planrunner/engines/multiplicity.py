"""Adjusted p-values for a family of analyses (pure functions of the raw p-values).

Formulas as in Holm (1979), Hochberg (1988), Benjamini & Hochberg (1995) and Benjamini & Yekutieli
(2001); every adjusted value is at least the raw one and at most 1.
"""

from __future__ import annotations

import numpy as np

METHOD_NAMES = {
    "bonferroni": "Bonferroni",
    "holm": "Holm step-down",
    "hochberg": "Hochberg step-up",
    "benjamini-hochberg": "Benjamini–Hochberg (false discovery rate)",
    "benjamini-yekutieli": "Benjamini–Yekutieli (false discovery rate, any dependence)",
    "max-t": "Westfall–Young max-T step-down (same permutations)",
}


def adjust(p_values: list[float], method: str) -> list[float]:
    """Adjusted p-values, in the order given."""
    p = np.asarray(p_values, dtype=float)
    m = p.size
    order = np.argsort(p, kind="stable")
    ranked = p[order]
    rank = np.arange(1, m + 1)
    if method == "bonferroni":
        adjusted_sorted = np.minimum(1.0, m * ranked)
    elif method == "holm":
        adjusted_sorted = np.minimum(1.0, np.maximum.accumulate((m - rank + 1) * ranked))
    elif method == "hochberg":
        adjusted_sorted = np.minimum(1.0, np.minimum.accumulate(((m - rank + 1) * ranked)[::-1])[::-1])
    elif method in ("benjamini-hochberg", "benjamini-yekutieli"):
        scale = np.sum(1.0 / rank) if method == "benjamini-yekutieli" else 1.0
        adjusted_sorted = np.minimum(1.0, np.minimum.accumulate((scale * m / rank * ranked)[::-1])[::-1])
    else:
        raise ValueError(f"unknown multiplicity method {method!r}")
    out = np.empty(m)
    out[order] = adjusted_sorted
    return [float(v) for v in out]
