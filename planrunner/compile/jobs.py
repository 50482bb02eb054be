"""Turn a checked plan and the tables it read into jobs: pure arrays plus everything an engine needs.

After this step nothing refers to the plan or to pandas any more; a job can be sent to another
process and gives the same numbers there.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from planrunner.compile import design
from planrunner.compile.modeljobs import model_design, model_options
from planrunner.data.formats import TEXT_FORMATS, in_rows
from planrunner.data.sets import select
from planrunner.data.tables import Table
from planrunner.engines.bootstrap import BootstrapOptions
from planrunner.engines.jackknife import JackknifeOptions
from planrunner.engines.modelboot import ModelBootstrapOptions
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.precision import BootstrapPrecision, TestPrecision, family_levels
from planrunner.engines.statistics import Statistic, bind, get_statistic
from planrunner.engines.streams import Stream, stream_for
from planrunner.engines.survival import flipped
from planrunner.engines.teststats import K_GROUP
from planrunner.errors import DataError
from planrunner.plan.decisions import null_shifts
from planrunner.plan.roles import planned_intervals
from planrunner.plan.schema import Analysis, BootstrapAnalysis, Defaults, PermutationAnalysis, Plan, precision_of

Options = BootstrapOptions | JackknifeOptions | PermutationOptions | ModelBootstrapOptions


@dataclass(frozen=True)
class Job:
    analysis_id: str
    method: str
    statistic: Statistic
    samples: tuple[np.ndarray, ...]
    strata: tuple[np.ndarray, ...] | None
    group_labels: tuple[str, ...]
    strata_labels: tuple[str, ...] | None
    options: Options  # the method's options, built once by `compile_job`
    stream: Stream
    # the rest of the design (see `planrunner.compile.design`)
    clusters: tuple[np.ndarray, ...] | None = None
    paired: bool = False
    warnings: tuple[Any, ...] = ()
    design: dict[str, Any] = field(default_factory=dict)  # permutation designs (see compile_design)
    # a censored outcome: ("right", None), or ("left", M) when the samples hold times M − x
    censoring: tuple[str, float | None] | None = None
    null_shifts: tuple[float, ...] = ()  # a permutation decision's shifted nulls (plan/decisions.py)

    def settings(self) -> dict[str, Any]:
        """The options as the record states them (JSON values); a test with covariates adds whose
        residuals it permutes."""
        out = self.options.settings()
        if "residuals" in self.design:
            out["covariate_permutation"] = self.design["residuals"].method
        return out

    def counts(self) -> dict[str, Any]:
        """Observations per group and, where declared, per stratum within group and clusters per group."""
        n: dict[str, Any] = {label: int(s.shape[0]) for label, s in zip(self.group_labels, self.samples)}
        out: dict[str, Any] = {"groups": n}
        if self.strata is not None and self.strata_labels is not None:
            out["strata"] = {label: {self.strata_labels[k]: int(np.sum(codes == k)) for k in np.unique(codes)}
                             for label, codes in zip(self.group_labels, self.strata)}
        clusters = self.clusters if self.clusters is not None else self.design.get("clusters")
        if clusters is not None:  # the units that were resampled or shuffled
            out["clusters"] = {label: int(np.unique(codes).size) for label, codes in zip(self.group_labels, clusters)}
        return out


def compile_jobs(plan: Plan, tables: dict[str, Table]) -> list[Job]:
    jobs = []
    for analysis in plan.analyses:
        table = select(tables[analysis.data], analysis.set)
        try:
            jobs.append(compile_job(plan, analysis, table))
        except DataError as exc:  # a typed file's rows are observations, not lines of text
            raise (exc if table.format in TEXT_FORMATS else in_rows(exc)) from None
    return jobs


def bootstrap_options(analysis: BootstrapAnalysis, defaults: Defaults) -> BootstrapOptions:
    """The bootstrap's options: what the analysis declares, else the plan's defaults, else the
    engine's own (a key the plan leaves as None is omitted, so `BootstrapOptions` supplies it)."""
    intervals = planned_intervals(analysis)  # the pre-specified one first (plan/roles.py)
    target = precision_of(analysis, defaults)
    declared: dict[str, Any] = {
        "resamples": target.max_resamples if target is not None else analysis.resamples or defaults.resamples,
        "precision": None if target is None else BootstrapPrecision(
            max_resamples=target.max_resamples, se_relative=target.se_relative,
            interval_end_sd=target.interval_end_sd),
        "confidence": analysis.confidence or defaults.confidence,
        "intervals": intervals, "studentized_se": analysis.studentized_se,
        "inner_resamples": analysis.inner_resamples, "on_degenerate": analysis.on_degenerate,
        "blocks": None if analysis.blocks is None else (analysis.blocks.scheme, analysis.blocks.length),
        "parametric": analysis.parametric, "trials": analysis.trials, "exhaustive": analysis.exhaustive,
        "save_distribution": analysis.save_distribution,
        # the analysis's own key only: defaults.alternative is for the permutation-type tests
        "alternative": analysis.alternative, "null_value": analysis.null_value}
    return BootstrapOptions(**{key: value for key, value in declared.items() if value is not None})


def _options(plan: Plan, analysis: Analysis) -> Options:
    d = plan.defaults
    if analysis.method == "bootstrap":
        return bootstrap_options(analysis, d)
    if analysis.method == "permutation":
        return permutation_options(analysis, d, plan)
    return JackknifeOptions()


def permutation_options(analysis: PermutationAnalysis, defaults: Defaults,
                        plan: Plan | None = None) -> PermutationOptions:
    """The options of a permutation-type test: what the analysis declares, else the plan's defaults.
    With a precision target the test decides at alpha and, in a multiplicity family, at every level
    the family's adjustment may compare its p-value with."""
    k_group = analysis.statistic in K_GROUP  # large F or H is the evidence: one-sided by construction
    confidence = analysis.confidence or defaults.confidence
    alpha = round(1.0 - confidence, 12)
    target = precision_of(analysis, defaults)
    precision = None
    if target is not None:
        assert target.decision_risk is not None  # precision_of gives a test only a target with a risk
        levels = [level for fam in (plan.multiplicity if plan is not None else [])
                  if analysis.id in fam.family and fam.method != "max-t"
                  for level in family_levels(fam.method, len(fam.family), alpha)]
        precision = TestPrecision(risk=target.decision_risk, max_resamples=target.max_resamples, alpha=alpha,
                                  levels=tuple(levels))
    return PermutationOptions(resamples=target.max_resamples if target is not None
                              else analysis.resamples or defaults.resamples,
                              alternative="greater" if k_group else (analysis.alternative or defaults.alternative),
                              exact=analysis.exact, two_sided=analysis.two_sided,
                              alpha=alpha, intervals=tuple(analysis.intervals or ()),
                              confidence=confidence, precision=precision)


def compile_job(plan: Plan, analysis: Analysis, table: Table) -> Job:
    statistic = get_statistic(analysis.statistic)
    if statistic.parameter is not None:
        statistic = bind(statistic, getattr(analysis, statistic.parameter))
    outcome = table.columns[analysis.outcome]
    where = f"analysis '{analysis.id}'"
    values = outcome.astype(float)
    if statistic.outcome == "binary" and not np.isin(values, (0.0, 1.0)).all():
        bad = table.lines[~np.isin(values, (0.0, 1.0))][:5]
        raise DataError(f"'{analysis.statistic}' needs 0/1 outcomes but '{analysis.outcome}' has other values "
                        f"(lines {', '.join(map(str, bad))})", where=f"{table.file}",
                        hint="declare a boolean outcome or recode it as 0 and 1")
    if analysis.groups is None:
        masks = [np.ones(values.size, dtype=bool)]
        labels: tuple[str, ...] = ("all rows",)
    else:
        group_column = design.labels_of(table, analysis.groups.by)
        labels = tuple(analysis.groups.compare)
        masks = [group_column == level for level in labels]
    for label, mask in zip(labels, masks):
        if not mask.any():
            raise DataError(f"{where}: no rows are left in group '{label}'", where=table.file,
                            hint=f"check groups.compare against the values of '{analysis.groups.by}'"
                                 " and the rows_where filter" if analysis.groups else "check the rows_where filter")
    paired = analysis.pairs is not None and analysis.method == "bootstrap"
    if paired:
        masks = design.pair_order(table, str(analysis.pairs), masks, where)  # row i of each group is pair i
    if analysis.order is not None:
        masks = [design.time_order(table, analysis.order, m, where) for m in masks]
    clusters = None
    if analysis.clusters is not None:
        clusters, _ = design.cluster_codes(table, analysis.clusters, masks)
    warnings = design.repeated_id_warnings(table, analysis, plan.datasets[analysis.data], masks)
    if analysis.predictor is not None:
        # two-column statistics take (n, 2) arrays: predictor first, outcome second
        values = np.column_stack([table.columns[analysis.predictor].astype(float), values])
    strata = strata_labels = None
    codes = None
    if analysis.strata is not None:
        stratum_column = design.labels_of(table, analysis.strata)
        strata_labels_all, codes = np.unique(stratum_column, return_inverse=True)
        strata_labels = tuple(str(s) for s in strata_labels_all)
        strata = tuple(codes[m].astype(np.int64) for m in masks)
    censoring: tuple[str, float | None] | None = None
    if statistic.outcome == "censored":
        values, statistic, censoring = censored_values(analysis, table, values, masks, statistic, codes)
    samples = tuple(values[m] for m in masks)
    permutation_design: dict[str, Any] = {}
    options = _options(plan, analysis)
    if statistic.form == "model" and isinstance(analysis, PermutationAnalysis):
        # Freedman–Lane: the group coefficient's residual permutation reads the model's design matrix
        permutation_design = {"model": model_design(plan, analysis, table, masks),
                              "residuals": design.residual_scheme(analysis, table, masks)}
        if analysis.clusters is not None:  # the record's counts: clusters per group
            permutation_design["clusters"] = design.cluster_codes(table, analysis.clusters, masks)[0]
    elif statistic.form == "model" and isinstance(analysis, BootstrapAnalysis):
        # a model statistic reads a design matrix, not the samples (those give the record's counts)
        permutation_design = {"model": model_design(plan, analysis, table, masks)}
        if clusters is not None:
            permutation_design["clusters"], clusters = clusters, None
        options = model_options(analysis, plan.defaults)
    elif analysis.method == "permutation":  # the bootstrap's design is the fields above
        samples, permutation_design = compile_design(analysis, table, masks, samples)
    return Job(analysis_id=analysis.id, method=analysis.method, statistic=statistic, samples=samples,
               strata=strata, group_labels=labels, strata_labels=strata_labels,
               options=options, stream=stream_for(plan.seed, analysis.id),
               clusters=clusters, paired=paired, warnings=warnings, design=permutation_design,
               censoring=censoring, null_shifts=null_shifts(analysis, plan))


def censored_values(analysis: Analysis, table: Table, values: np.ndarray, masks: list[np.ndarray],
                    statistic: Statistic,
                    codes: np.ndarray | None) -> tuple[np.ndarray, Statistic, tuple[str, float | None]]:
    """Rows (time, event) of a censored outcome, and (time, event, stratum code) for the log-rank
    statistic. Left-censored values x become right-censored times M − x, M the largest value the
    analysis uses, and the statistic maps its result back (``survival.flipped``)."""
    assert analysis.event is not None  # the plan check requires it
    events = table.columns[analysis.event].astype(float)
    times = values
    largest = None
    if analysis.censoring == "left":
        largest = float(np.max(values[np.logical_or.reduce(masks)]))
        times = largest - values
        if statistic.form == "survival":
            statistic = flipped(statistic, largest)
    columns = [times, events]
    if statistic.columns == 3:
        columns.append(np.zeros(values.size) if codes is None else codes.astype(float))
    return np.column_stack(columns), statistic, (analysis.censoring or "right", largest)


def compile_design(analysis: Analysis, table: Table, masks: list[np.ndarray],
                   samples: tuple[np.ndarray, ...]) -> tuple[tuple[np.ndarray, ...], dict[str, Any]]:
    """Arrays for the declared pairs, clusters and covariates (permutation designs)."""
    found: dict[str, Any] = {}
    if analysis.pairs is not None:
        aligned = design.pair_order(table, analysis.pairs, masks, f"analysis '{analysis.id}'")
        # where each aligned row sits among its group's rows, so the group's values follow the pairs
        samples = tuple(np.asarray(samples[g], dtype=float)[np.searchsorted(np.flatnonzero(masks[g]), rows)]
                        for g, rows in enumerate(aligned))
        found["pairs"] = tuple(str(v) for v in design.labels_of(table, analysis.pairs)[aligned[0]])
    if analysis.clusters is not None:
        found["clusters"], found["cluster_labels"] = design.cluster_codes(table, analysis.clusters, masks)
    if analysis.covariates:
        found["covariates"] = np.column_stack([table.columns[c].astype(float) for c in analysis.covariates])
        found["covariate_names"] = tuple(analysis.covariates)
        found["residuals"] = design.residual_scheme(analysis, table, masks)
    return samples, found
