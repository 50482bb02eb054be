"""Choose the permutation scheme a job's design implies and run its engine (called by `execute`).

groups → labels shuffled (within strata); pairs → sign-flip within pairs; clusters → cluster labels
shuffled; a two-column statistic → outcome shuffled against the predictor; covariates → residuals
permuted (Freedman–Lane or ter Braak, over all rows, within strata or as whole clusters). The shift
interval (``intervals: [shift]``) is added by inverting the two-group test.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from planrunner.compile.jobs import Job
from planrunner.engines import association, clusters, inversion, permutation, signflip
from planrunner.engines.association import association_test
from planrunner.engines.clusters import cluster_test
from planrunner.engines.inversion import shift_interval, shifted_tests
from planrunner.engines.modelboot import ModelBootstrapOptions, check_model
from planrunner.engines.models import check_rank
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.permutation import permutation_test
from planrunner.engines.results import PermutationResult
from planrunner.engines.signflip import signflip_test
from planrunner.engines.statistics import get_statistic
from planrunner.errors import EngineError


def planned_computation(job: Job) -> str:
    """The computation ``run_permutation`` will use for the job, or the engine's refusal (raised,
    with the analysis id as a run gives it), found by the engine's own rule without resampling
    (``check`` runs it for every permutation job)."""
    try:
        return _computation(job)
    except EngineError as exc:
        raise EngineError(f"{exc.message}", where=f"analysis '{job.analysis_id}'", hint=exc.hint) from None


def planned_model(job: Job) -> None:
    """A model statistic's refusal (rank, separation, scheme, clusters), as a run gives it, without resampling."""
    assert isinstance(job.options, ModelBootstrapOptions)
    try:
        check_model(job.design["model"], job.statistic.name, job.options)
    except EngineError as exc:
        raise EngineError(f"{exc.message}", where=f"analysis '{job.analysis_id}'", hint=exc.hint) from None


def _residual_test(job: Job) -> tuple[np.ndarray, np.ndarray | None] | None:
    """(predictor, outcome) and the covariates of a test that permutes residuals (Freedman–Lane or
    ter Braak), or None for another design. For adjusted_mean_difference the predictor is the 0/1
    indicator of the first group (its partial slope is the adjusted difference), its design checked
    for constant or collinear covariates first."""
    if "residuals" not in job.design:
        return None
    if "model" in job.design:
        model = job.design["model"]
        check_rank(model, "the model")
        covariates = model.x[:, 2:] if model.x.shape[1] > 2 else None
        return np.column_stack([model.x[:, 1], model.y]), covariates
    return job.samples[0], job.design["covariates"]


def _computation(job: Job) -> str:
    options = job.options
    assert isinstance(options, PermutationOptions)
    residual = _residual_test(job)
    if residual is not None:
        xy, covariates = residual
        return association.computation(xy, get_statistic("slope"), options, covariates=covariates,
                                       residuals=job.design["residuals"])
    if "pairs" in job.design:
        return signflip.computation(job.samples[0], job.samples[1], job.statistic, options)
    if "clusters" in job.design:
        x_codes, y_codes = job.design["clusters"]
        return clusters.computation(job.samples[0], job.samples[1], x_codes, y_codes, job.statistic, options)
    if job.statistic.samples == 1:
        return association.computation(job.samples[0], job.statistic, options)
    found = permutation.computation(job.samples, job.statistic, options, strata=job.strata)
    if "shift" in options.intervals or job.null_shifts:  # their own choice: enumeration or Monte Carlo
        inversion.computation(job.samples[0], job.samples[1], job.statistic, options)
    return found


def run_permutation(job: Job) -> PermutationResult:
    options = job.options
    assert isinstance(options, PermutationOptions)  # compile builds it for every permutation job
    residual = _residual_test(job)
    if residual is not None:
        xy, covariates = residual
        return association_test(xy, get_statistic("slope"), options, stream=job.stream, covariates=covariates,
                                residuals=job.design["residuals"])
    if "pairs" in job.design:
        return signflip_test(job.samples[0], job.samples[1], job.statistic, options, stream=job.stream)
    if "clusters" in job.design:
        x_codes, y_codes = job.design["clusters"]
        return cluster_test(job.samples[0], job.samples[1], x_codes, y_codes, job.statistic, options,
                            stream=job.stream)
    if job.statistic.samples == 1:
        return association_test(job.samples[0], job.statistic, options, stream=job.stream)
    result = permutation_test(job.samples, job.statistic, options, stream=job.stream, strata=job.strata)
    if "shift" in options.intervals:
        interval, estimate = shift_interval(job.samples[0], job.samples[1], job.statistic, options,
                                            stream=job.stream.child(1))
        result = dataclasses.replace(result, intervals=(interval,), shift_estimate=estimate)
    if job.null_shifts:  # the same stream as the shift interval: the same arrangements
        tests = shifted_tests(job.samples[0], job.samples[1], job.statistic, options, stream=job.stream.child(1),
                              shifts=job.null_shifts)
        result = dataclasses.replace(result, shifted_tests=tests)
    return result
