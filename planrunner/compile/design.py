"""Turn the declared design (pairs, clusters, time order) into arrays for the engines, and
find design problems only the data reveal. Used by `compile`; no files, no printing."""

from __future__ import annotations

from typing import Any

import numpy as np

from planrunner.data.tables import Table, group_values
from planrunner.engines.association import FREEDMAN_LANE, ResidualScheme
from planrunner.engines.results import EngineWarning
from planrunner.errors import DataError


def labels_of(table: Table, column: str) -> np.ndarray:
    """A column's values as group, stratum, pair and cluster labels: named exactly as the data checks
    and ``groups.compare`` name them (booleans as true/false), the one rule for every design column."""
    return group_values(table.columns[column])


def residual_scheme(analysis: Any, table: Table, masks: list[np.ndarray]) -> ResidualScheme:
    """How a test with covariates permutes residuals: the plan's method and the stratum or cluster
    code of every row the analysis uses (rows in file order, as the model's and the samples' rows)."""
    used = np.logical_or.reduce(masks)
    found: dict[str, Any] = {}
    for key in ("strata", "clusters"):
        column = getattr(analysis, key)
        if column is not None:
            labels, codes = np.unique(labels_of(table, column)[used], return_inverse=True)
            found[key], found["labels"] = codes.astype(np.int64), tuple(str(v) for v in labels)
    return ResidualScheme(method=analysis.covariate_permutation or FREEDMAN_LANE, **found)


def cluster_codes(table: Table, column: str, masks: list[np.ndarray]) -> tuple[tuple[np.ndarray, ...], tuple[str, ...]]:
    """Integer cluster codes per group (codes shared across groups) and the cluster labels."""
    labels, codes = np.unique(labels_of(table, column), return_inverse=True)
    return tuple(codes[m].astype(np.int64) for m in masks), tuple(str(v) for v in labels)


def pair_order(table: Table, column: str, masks: list[np.ndarray], where: str) -> list[np.ndarray]:
    """Row numbers of each of the two groups, aligned so that row i of each is pair i (pairs sorted).

    The one alignment of pairs (bootstrap and permutation alike). The data checks have already
    refused a pair with a missing or repeated row, naming its lines; the errors here only guard the
    contract when this is called on its own."""
    ids = labels_of(table, column)
    aligned = []
    for label, mask in zip(("first", "second"), masks):
        rows = np.flatnonzero(mask)
        values, counts = np.unique(ids[rows], return_counts=True)
        if (counts > 1).any():
            twice = values[counts > 1][0]
            raise DataError(f"{where}: pair '{twice}' has {int(counts[counts > 1][0])} rows in the {label} group",
                            where=table.file, hint="each pair needs exactly one row in each group")
        aligned.append(rows[np.argsort(ids[rows], kind="stable")])
    first, second = (ids[r] for r in aligned)
    if first.shape != second.shape or not np.array_equal(first, second):
        lonely = sorted(set(first) ^ set(second))
        raise DataError(f"{where}: {len(lonely)} pair(s) lack a row in one of the groups (first: '{lonely[0]}')",
                        where=table.file, hint="each pair needs exactly one row in each group; drop incomplete pairs")
    return aligned


def time_order(table: Table, column: str, mask: np.ndarray, where: str) -> np.ndarray:
    """Row numbers of one group in increasing time order; repeated times are refused."""
    rows = np.flatnonzero(mask)
    times = table.columns[column][rows]
    order = np.argsort(times, kind="stable")
    ordered = times[order]
    if ordered.shape[0] > 1 and np.any(ordered[1:] == ordered[:-1]):
        same = ordered[1:][ordered[1:] == ordered[:-1]][0]
        raise DataError(f"{where}: two rows share the time {same} in '{column}'", where=table.file,
                        hint="block resampling needs one row per time point")
    return rows[order]


def repeated_id_warnings(table: Table, analysis: Any, dataset: Any,
                         masks: list[np.ndarray]) -> tuple[EngineWarning, ...]:
    """Rows that repeat the value of an identifier column (declared `identifier: true`) within a
    group, or hold one value in both groups, with no clusters, pairs or time order declared, are
    probably not independent: say so next to the numbers."""
    if analysis.clusters is not None or analysis.pairs is not None or analysis.order is not None:
        return ()
    used = {analysis.outcome, analysis.predictor, analysis.strata, analysis.groups.by if analysis.groups else None}
    out = []
    for name, spec in dataset.columns.items():
        if not spec.identifier or name in used or name not in table.columns:
            continue
        ids = labels_of(table, name)
        repeats = sum(int(np.sum(np.unique(ids[m], return_counts=True)[1] > 1)) for m in masks)
        shared = set.intersection(*[set(ids[m]) for m in masks]) if len(masks) > 1 else set()
        if shared:
            out.append(EngineWarning(
                "ids-in-both-groups",
                f"{len(shared)} value(s) of the identifier column '{name}' occur in more than one group, and no "
                f"pairs are declared: the groups are probably paired; declare pairs: {name} if each value is "
                "one unit measured under each group"))
        if repeats:
            out.append(EngineWarning(
                "repeated-ids",
                f"{repeats} value(s) of the identifier column '{name}' repeat within a group, and no clusters "
                f"are declared: rows sharing an identifier are probably not independent; declare "
                f"clusters: {name} (or pairs) if they belong to one unit"))
    return tuple(out)
