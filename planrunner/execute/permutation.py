"""Choose the permutation scheme a job's design implies and run its engine (called by `execute`).

groups → labels shuffled (within strata); pairs → sign-flip within pairs; clusters → cluster labels
shuffled; a two-column statistic → outcome shuffled against the predictor, or Freedman–Lane with
covariates. The shift interval (``intervals: [shift]``) is added by inverting the two-group test.
"""

from __future__ import annotations

import dataclasses
from typing import Any

from planrunner.compile.jobs import Job
from planrunner.engines.association import association_test
from planrunner.engines.clusters import cluster_test
from planrunner.engines.inversion import shift_interval
from planrunner.engines.permutation import permutation_test
from planrunner.engines.signflip import signflip_test


def run_permutation(job: Job) -> Any:
    o = job.options
    common = dict(resamples=o["resamples"], alternative=o["alternative"], stream=job.stream, exact=o["exact"],
                  two_sided=o.get("two_sided", "doubled"), alpha=o.get("alpha"))
    if "pairs" in job.design:
        return signflip_test(job.samples[0], job.samples[1], job.statistic, **common)
    if "clusters" in job.design:
        x_codes, y_codes = job.design["clusters"]
        return cluster_test(job.samples[0], job.samples[1], x_codes, y_codes, job.statistic, **common)
    if job.statistic.samples == 1:
        return association_test(job.samples[0], job.statistic, covariates=job.design.get("covariates"), **common)
    result = permutation_test(job.samples, job.statistic, strata=job.strata, **common)
    if "shift" in o.get("intervals", ()):
        interval, estimate = shift_interval(job.samples[0], job.samples[1], job.statistic,
                                            confidence=o["confidence"], resamples=o["resamples"],
                                            stream=job.stream.child(1), exact=o["exact"])
        result = dataclasses.replace(result, intervals=(interval,), shift_estimate=estimate)
    return result
