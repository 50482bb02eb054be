"""The arrays and options of a model statistic's job: outcome, design matrix (intercept, target,
covariates with categories expanded to indicators), cells, clusters. Used by `compile.jobs`."""

from __future__ import annotations

import numpy as np

from planrunner.compile import design as designs
from planrunner.data.tables import Table
from planrunner.engines.modelboot import ModelBootstrapOptions
from planrunner.engines.models import Design
from planrunner.engines.precision import BootstrapPrecision
from planrunner.plan.derived import dataset_columns
from planrunner.plan.schema import Analysis, BootstrapAnalysis, Defaults, Plan, precision_of

LOGISTIC = ("standardized_risk_difference", "standardized_risk_ratio", "standardized_odds_ratio")


def model_design(plan: Plan, analysis: Analysis, table: Table, masks: list[np.ndarray]) -> Design:
    """The model's arrays over the rows the analysis uses (the compared groups, or every row)."""
    used = np.logical_or.reduce(masks)
    y = np.asarray(table.columns[analysis.outcome], dtype=float)[used]
    if analysis.groups is not None:
        target = masks[0][used].astype(float)  # 1 for the first compared group, 0 for the second
        target_name = f"{analysis.groups.by}={analysis.groups.compare[0]}"
    else:
        assert analysis.predictor is not None
        target = np.asarray(table.columns[analysis.predictor], dtype=float)[used]
        target_name = analysis.predictor
    columns = [np.ones(y.shape[0]), target]
    names = ["(intercept)", target_name]
    declared = dataset_columns(plan.datasets[analysis.data])
    for name in analysis.covariates or ():
        if declared[name].type in ("category", "text"):
            values = designs.labels_of(table, name)[used]
            levels = [v for v in (declared[name].levels or sorted(set(values))) if v in set(values)]
            for level in levels[1:]:  # the first level is the reference
                columns.append((values == level).astype(float))
                names.append(f"{name}={level}")
        else:
            columns.append(np.asarray(table.columns[name], dtype=float)[used])
            names.append(name)
    group_code = np.zeros(used.size, dtype=np.int64)
    for g, mask in enumerate(masks):
        group_code[mask] = g
    cells = group_code[used]
    if analysis.strata is not None:
        _, strata = np.unique(designs.labels_of(table, analysis.strata)[used], return_inverse=True)
        cells = cells * (int(strata.max()) + 1) + strata
    clusters = None
    if analysis.clusters is not None:
        _, clusters = np.unique(designs.labels_of(table, analysis.clusters)[used], return_inverse=True)
        clusters = clusters.astype(np.intp)
    _, cells = np.unique(cells, return_inverse=True)
    return Design(y=y, x=np.column_stack(columns), names=tuple(names), cells=cells.astype(np.intp),
                  clusters=clusters, lines=table.lines[used])


def model_options(analysis: BootstrapAnalysis, defaults: Defaults) -> ModelBootstrapOptions:
    """The options of a model bootstrap: the analysis's keys, else the plan's defaults, else the engine's."""
    scheme = analysis.model_resampling or "cases"
    intervals = tuple(analysis.intervals)
    if "intervals" not in analysis.model_fields_set and scheme != "cases":
        intervals = ("percentile",)  # the default BCa needs the cases jackknife
    target = precision_of(analysis, defaults)
    declared = {"resamples": target.max_resamples if target is not None else analysis.resamples or defaults.resamples,
                "precision": None if target is None else BootstrapPrecision(
                    max_resamples=target.max_resamples, se_relative=target.se_relative,
                    interval_end_sd=target.interval_end_sd),
                # the analysis's own key only: defaults.alternative is for the permutation-type tests
                "alternative": analysis.alternative, "null_value": analysis.null_value,
                "confidence": analysis.confidence or defaults.confidence, "intervals": intervals,
                "model": "logistic" if analysis.statistic in LOGISTIC else (analysis.model or "linear"),
                "model_resampling": scheme, "weights": analysis.weights, "impose_null": analysis.impose_null,
                "on_degenerate": analysis.on_degenerate, "save_distribution": analysis.save_distribution}
    return ModelBootstrapOptions(**{k: v for k, v in declared.items() if v is not None})  # type: ignore[arg-type]
