"""The joint max-T run of each ``max-t`` family (one run on the same permutations for all members)."""

from __future__ import annotations

from typing import Any

from planrunner.engines.maxt import MaxTResult, max_t
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.streams import stream_for


def max_t_families(plan: Any, jobs: list[Any]) -> dict[int, MaxTResult]:
    """Westfall–Young max-T for every ``max-t`` family: one joint run on the same permutations.

    The family's stream is keyed by ``"max-t:" + the member ids joined by ","``, so it never shares
    draws with any analysis and does not depend on the order of the analyses in the plan.
    """
    by_id = {job.analysis_id: job for job in jobs}
    out: dict[int, MaxTResult] = {}
    for j, fam in enumerate(plan.multiplicity):
        if fam.method != "max-t":
            continue
        members = [by_id[i] for i in fam.family]
        first = members[0]
        options = [m.options for m in members]
        assert all(isinstance(o, PermutationOptions) for o in options)  # the plan rules: permutation tests
        # the plan rules give every member the same resamples and exact choice
        out[j] = max_t([(m.samples, m.statistic, o.alternative) for m, o in zip(members, options)],
                       strata=first.strata, resamples=options[0].resamples, exact=options[0].exact,
                       stream=stream_for(plan.seed, "max-t:" + ",".join(fam.family)))
    return out
