"""What only the data reveal, checked for every analysis before any resampling.

The schema and `plancheck` check the plan; `io` checks each file against its declared columns.
This module checks the rows each analysis will use: every compared group is present and not
emptied by the filter, each group has enough rows for the method, the outcome varies, every
stratum holds rows of both groups, pairs are complete and clusters stay within one group. Each
problem is one `DataError` naming the analysis, the file, the column, the lines and what to do,
so that `planrunner check` finds it before a long run does.
"""

from __future__ import annotations

import unicodedata
from typing import Any

import numpy as np

from planrunner.data.formats import TEXT_FORMATS, in_rows
from planrunner.data.sets import select
from planrunner.data.tables import FLOAT_EXACT, Table, group_values, lines_text
from planrunner.engines.statistics import MAGNITUDE_LIMIT, STATISTICS
from planrunner.errors import DataError
from planrunner.plan.derived import dataset_columns
from planrunner.plan.schema import Plan

# The fewest rows per group each method is given. One row cannot vary under any resampling;
# a statistic of two columns (a correlation) is fixed at ±1 by two rows, so it needs three.
MIN_ROWS = 2
MIN_ROWS_TWO_COLUMNS = 3
METHOD_WORDS = {"bootstrap": "the bootstrap", "jackknife": "the jackknife", "permutation": "a permutation test"}


def check_tables(plan: Plan, tables: dict[str, Table]) -> None:
    """Raise the first data problem of any analysis (analyses in plan order)."""
    for analysis in plan.analyses:
        columns = dataset_columns(plan.datasets[analysis.data])
        by = analysis.groups.by if analysis.groups is not None else None
        table = select(tables[analysis.data], analysis.set)
        try:
            check_analysis(analysis, table, declared=columns[by].levels if by in columns else None)
        except DataError as exc:  # a typed file's rows are observations, not lines of text
            raise (exc if table.format in TEXT_FORMATS else in_rows(exc)) from None


def _excluded(table: Table) -> str:
    if not table.excluded:
        return "no rows were excluded"
    return "excluded: " + "; ".join(f"{e.rows} row(s) for {e.reason}" for e in table.excluded)


def check_analysis(analysis: Any, table: Table, declared: list[str] | None = None) -> None:
    """The data problems of one analysis; `declared` are the levels the plan declares for its
    group column (values declared there are deliberate, never near-duplicates)."""
    where = table.file
    who = f"analysis '{analysis.id}'"
    statistic = STATISTICS.get(analysis.statistic)
    two_columns = statistic is not None and statistic.columns == 2
    if analysis.groups is None:
        labels: tuple[str, ...] = ("all rows",)
        masks = [np.ones(table.rows_used, dtype=bool)]
    else:
        by = analysis.groups.by
        column = group_values(table.columns[by])
        labels = tuple(analysis.groups.compare)
        masks = [column == level for level in labels]
        for level, mask in zip(labels, masks):
            if mask.any():
                continue
            present = table.values_read.get(by, ())
            if level not in present:
                listed = ", ".join(present[:10]) + (" ..." if len(present) > 10 else "")
                near = [v for v in present if fold(v) == fold(level)]
                spelled = (f"; '{level}' is {code_points(level)}, the file's '{near[0]}' is {code_points(near[0])}"
                           if near else "")
                raise DataError(f"{who}: group '{level}' does not occur in column '{by}' "
                                f"(values in the file: {listed}){spelled}", where=where,
                                hint=f"check groups.compare against the file (spelling, case), or use the "
                                     f"extract that holds group '{level}'")
            raise DataError(f"{who}: no rows of group '{level}' (column '{by}') are left; {_excluded(table)}",
                            where=where,
                            hint="check the rows_where filter, the analysis set and the missing-value handling")
    if analysis.groups is not None:
        _refuse_near_duplicates(analysis, table, column, labels, who, declared or [])
    minimum = MIN_ROWS_TWO_COLUMNS if two_columns else MIN_ROWS
    for label, mask in zip(labels, masks):
        count = int(mask.sum())
        if count == 0:
            raise DataError(f"{who}: no rows are left; {_excluded(table)}", where=where,
                            hint="check the rows_where filter, the analysis set and the missing-value handling")
        if count < minimum:
            group = f"group '{label}' has" if analysis.groups else "it has"
            raise DataError(f"{who}: {group} {count} row(s) (line(s) {lines_text(table.lines[mask])}); "
                            f"{METHOD_WORDS.get(analysis.method, analysis.method)} needs at least {minimum}"
                            f"{' per group' if analysis.groups else ''}", where=where,
                            hint="use more data, or relax the rows_where filter or the analysis set")
    used = np.logical_or.reduce(masks)
    for name in (analysis.outcome, analysis.predictor, *(getattr(analysis, "covariates", None) or ())):
        if name is not None:
            refuse_inexact_integers(table, name, used, who)
            _refuse_overflowing(table, name, used, who)
    binary = statistic is not None and statistic.outcome == "binary"
    for role, name in (("outcome", analysis.outcome), ("predictor", analysis.predictor)):
        # a 0/1 outcome that is all 0 is a finding (no events), not a broken extract
        if name is None or (binary and role == "outcome"):
            continue
        values = np.asarray(table.columns[name][used], dtype=float)
        if values.size and np.all(values == values[0]):
            raise DataError(f"{who}: every one of the {values.size} values of the {role} '{name}' it uses is "
                            f"{values[0]:g} (lines {lines_text(table.lines[used])}); resampling cannot vary a "
                            "constant", where=where,
                            hint=f"check that the file is the right extract and '{name}' the right column")
    if statistic is not None and statistic.outcome == "censored" and getattr(analysis, "event", None) is not None:
        check_censored(analysis, table, labels, masks, who)
    if analysis.groups is not None and analysis.strata is not None:
        _check_strata(analysis, table, labels, masks, who)
    if analysis.groups is not None and getattr(analysis, "pairs", None) is not None:
        _check_pairs(analysis, table, labels, masks, who)
    if analysis.groups is not None and getattr(analysis, "clusters", None) is not None:
        _check_clusters(analysis, table, labels, masks, who)


def check_censored(analysis: Any, table: Table, labels: tuple[str, ...], masks: list[np.ndarray], who: str) -> None:
    """A censored outcome: times not negative (right censoring), events 0 or 1, at least one event per
    group; then what the statistic reads must exist in the data (a quantile reached, a time or horizon
    within the follow-up). Every problem of the analysis in one message."""
    time_name, event_name = analysis.outcome, analysis.event
    left = analysis.censoring == "left"
    used = np.logical_or.reduce(masks)
    values = np.asarray(table.columns[time_name], dtype=float)
    events = np.asarray(table.columns[event_name], dtype=float)
    problems = []
    negative = used & (values < 0)
    if negative.any() and not left:
        problems.append(DataError(f"{who}: {int(negative.sum())} negative time(s) in '{time_name}' (e.g. "
                                  f"{values[negative][0]:g} on line(s) {lines_text(table.lines[negative])})",
                                  hint="times are measured from the origin (0) of follow-up; fix the extract"))
    bad = used & ~np.isin(events, (0.0, 1.0))
    if bad.any():
        problems.append(DataError(f"{who}: the event column '{event_name}' holds {int(bad.sum())} value(s) other "
                                  f"than 0 and 1 (e.g. {events[bad][0]:g} on line(s) {lines_text(table.lines[bad])})",
                                  hint="code 1 = event observed (detected) and 0 = censored (below the limit)"))
    word = "detected" if left else "with an observed event"
    for label, mask in zip(labels, masks):
        if mask.any() and not np.any(events[mask] == 1.0):
            where = f"group '{label}'" if analysis.groups else "the analysis"
            problems.append(DataError(f"{who}: every one of the {int(mask.sum())} rows of {where} is censored "
                                      f"(no row {word}; lines {lines_text(table.lines[mask])}), so the Kaplan–Meier "
                                      "curve never leaves 1", hint="check the event column's coding (1 = event), "
                                      "or report the follow-up without events"))
    if problems:
        raise _all_at_once(problems, table)
    _check_reach(analysis, table, labels, masks, who, values, events)


def _all_at_once(problems: list[DataError], table: Table) -> DataError:
    if len(problems) == 1:
        return DataError(problems[0].message, where=table.file, hint=problems[0].hint)
    return DataError(f"{len(problems)} problems with the censored outcome", where=table.file, problems=problems)


def _check_reach(analysis: Any, table: Table, labels: tuple[str, ...], masks: list[np.ndarray], who: str,
                 values: np.ndarray, events: np.ndarray) -> None:
    """The quantile must be reached, and a time or horizon must lie within each group's follow-up."""
    from planrunner.engines.statistics import bind
    from planrunner.engines.survival import SurvivalCompute, SurvivalSpec, flipped

    statistic = STATISTICS[analysis.statistic]
    if statistic.form != "survival":
        return
    if statistic.parameter is not None:
        statistic = bind(statistic, getattr(analysis, statistic.parameter))
    left = analysis.censoring == "left"
    used = np.logical_or.reduce(masks)
    largest = float(np.max(values[used]))
    times = largest - values if left else values
    if left:
        statistic = flipped(statistic, largest)
    compute = statistic.compute
    assert isinstance(compute, SurvivalCompute)
    spec = compute.spec
    one = SurvivalCompute(SurvivalSpec(spec.kind, spec.value, None, spec.flip))
    problems = []
    for label, mask in zip(labels, masks):
        group = f"group '{label}'" if analysis.groups else "the data"
        rows = np.flatnonzero(mask)
        if spec.kind in ("at", "rmst"):
            last = int(rows[np.argmax(times[rows])])
            if spec.value is not None and spec.value > times[last]:
                key = "at" if spec.kind == "at" else "horizon"
                problems.append(DataError(
                    f"{who}: {key} {spec.value:g} lies beyond the last follow-up of {group} ({times[last]:g}, "
                    f"line {int(table.lines[last])}); the Kaplan–Meier curve is not estimated there",
                    hint=f"choose {key} at most the shortest last follow-up of the groups, where several "
                         "subjects are still at risk"))
            continue
        if spec.kind != "quantile":
            continue
        value = float(one(np.vstack([times[mask], events[mask]])))
        if not np.isfinite(value):
            level = spec.value
            what = "median" if level == 0.5 else f"{level:g} quantile"
            lowest = "highest" if left else "largest"
            problems.append(DataError(
                f"{who}: the Kaplan–Meier {what} of {group} is not reached: "
                + ("too few values are detected above the limits" if left else
                   f"the estimated survival stays above {1 - (level or 0.5):g} up to the {lowest} time "
                   f"({float(np.max(times[mask])):g})") + f" (lines {lines_text(table.lines[mask])})",
                hint="report it as not reached within the follow-up; use km_quantile with a lower level, "
                     "survival_at or rmst for this group"))
    if problems:
        raise _all_at_once(problems, table)


def _check_strata(analysis: Any, table: Table, labels: tuple[str, ...], masks: list[np.ndarray], who: str) -> None:
    """Every stratum used must hold rows of every compared group: a stratum seen in one group only
    cannot be compared within (permutation) and distorts a stratified bootstrap comparison."""
    name = analysis.strata
    strata = group_values(table.columns[name])
    used = np.logical_or.reduce(masks)
    for stratum in sorted(set(strata[used])):
        for label, mask in zip(labels, masks):
            if not np.any(mask & (strata == stratum)):
                others = used & (strata == stratum)
                raise DataError(f"{who}: stratum '{stratum}' (column '{name}') has no rows in group '{label}'; "
                                f"its rows are on line(s) {lines_text(table.lines[others])}", where=table.file,
                                hint="exclude that stratum with the rows_where filter, merge it with another, "
                                     "or check the file")


def _check_pairs(analysis: Any, table: Table, labels: tuple[str, ...], masks: list[np.ndarray], who: str) -> None:
    """A pair is one unit measured once under each of the two groups."""
    name = analysis.pairs
    pairs = group_values(table.columns[name])
    used = np.logical_or.reduce(masks)
    for pair in sorted(set(pairs[used])):
        for label, mask in zip(labels, masks):
            rows = mask & (pairs == pair)
            count = int(rows.sum())
            if count == 1:
                continue
            if count == 0:
                elsewhere = table.lines[used & (pairs == pair)]
                problem = f"has no row in group '{label}' (its row(s): line(s) {lines_text(elsewhere)})"
            else:
                problem = f"has {count} rows in group '{label}' (line(s) {lines_text(table.lines[rows])})"
            raise DataError(f"{who}: pair '{pair}' (column '{name}') {problem}", where=table.file,
                            hint="every pair needs exactly one row in each group: fix the file, or exclude "
                                 "incomplete pairs with the rows_where filter (a deviation to document)")


def _check_clusters(analysis: Any, table: Table, labels: tuple[str, ...], masks: list[np.ndarray],
                    who: str) -> None:
    """A cluster is one randomised or sampled unit, so all its rows belong to one group."""
    name = analysis.clusters
    clusters = group_values(table.columns[name])
    seen: dict[str, str] = {}
    for label, mask in zip(labels, masks):
        for cluster in sorted(set(clusters[mask])):
            if cluster in seen:
                first = masks[labels.index(seen[cluster])] & (clusters == cluster)
                here = mask & (clusters == cluster)
                raise DataError(f"{who}: cluster '{cluster}' (column '{name}') has rows in group '{seen[cluster]}' "
                                f"(line(s) {lines_text(table.lines[first])}) and in group '{label}' "
                                f"(line(s) {lines_text(table.lines[here])})", where=table.file,
                                hint="a cluster must lie within one group: fix the group or the cluster "
                                     "labels in the file")
            seen[cluster] = label


def fold(text: str) -> str:
    """A level as a reader sees it: compatibility form, case folded, invisible characters dropped."""
    return "".join(c for c in unicodedata.normalize("NFKC", text).casefold()
                   if unicodedata.category(c) not in ("Cf", "Cc", "Zs", "Zl", "Zp"))


def code_points(text: str) -> str:
    """'é' -> 'U+00E9': what the eye cannot tell apart, spelled out."""
    return " ".join(f"U+{ord(c):04X}" for c in text[:20]) + (" ..." if len(text) > 20 else "")


def _refuse_near_duplicates(analysis: Any, table: Table, column: np.ndarray, labels: tuple[str, ...],
                            who: str, declared: list[str]) -> None:
    """Rows whose group differs from a compared level only by case, Unicode form or an invisible
    character would silently be left out: refuse them, unless the plan declares both as levels."""
    by = analysis.groups.by
    for level in labels:
        others = sorted({v for v in set(column.tolist()) - set(labels) - set(declared) if fold(v) == fold(level)})
        if not others:
            continue
        rows = column == others[0]
        raise DataError(f"{who}: column '{by}' holds '{others[0]}' ({code_points(others[0])}) beside the compared "
                        f"level '{level}' ({code_points(level)}), on line(s) {lines_text(table.lines[rows])}; they "
                        "differ only by case, Unicode form or invisible characters, and those rows would be "
                        "left out", where=table.file,
                        hint="fix the values in the file, exclude those rows with the rows_where filter, or declare "
                             f"both as levels of '{by}' if they are different groups")


def refuse_inexact_integers(table: Table, name: str, used: np.ndarray, who: str) -> None:
    """An integer column is computed with as doubles; beyond 2**53 a double no longer holds every
    whole number, so neighbouring values would merge. Refuse rather than round silently."""
    values = table.columns[name]
    if values.dtype.kind not in "iu":
        return
    beyond = used & ((values > FLOAT_EXACT) | (values < -FLOAT_EXACT))
    if beyond.any():
        first = int(values[np.flatnonzero(beyond)[0]])
        raise DataError(f"{who}: the integer column '{name}' holds {int(beyond.sum())} value(s) beyond "
                        f"2^53 = {FLOAT_EXACT:,} (e.g. {first} on line(s) {lines_text(table.lines[beyond])}); "
                        "computations use doubles, which cannot hold every whole number that large",
                        where=table.file, hint="subtract a common offset in the extract, or declare the "
                                               "column as number to accept rounding to about 16 digits")


def _refuse_overflowing(table: Table, name: str, used: np.ndarray, who: str) -> None:
    """Values so large that their squares overflow would give infinite variances and t statistics of
    0 (p = 1, a false 'degenerate' warning): refuse them with their lines."""
    values = table.columns[name]
    if values.dtype.kind not in "fiu":
        return
    huge = used & (np.abs(values.astype(float)) > MAGNITUDE_LIMIT)
    if huge.any():
        first = float(values[np.flatnonzero(huge)[0]])
        raise DataError(f"{who}: column '{name}' holds {int(huge.sum())} value(s) beyond ±{MAGNITUDE_LIMIT:g} "
                        f"(e.g. {first:g} on line(s) {lines_text(table.lines[huge])}); their squares pass the largest "
                        "double (1.8e308), so variances, standard errors and t statistics would be infinite or 0",
                        where=table.file, hint="check the value (a unit or decimal-point error?), or express the "
                                               "column in larger units")
