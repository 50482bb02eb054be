"""The joint max-T run of each ``max-t`` family (one run on the same permutations for all members).

Part of the execute stage: `pipeline.execute_plan` calls it after `execute_all`, for a run and for
verify's re-run alike, and hands its results to `record.build.build_record` beside the analyses'
results (the record builder never runs an engine).
"""

from __future__ import annotations

from planrunner.compile.jobs import Job
from planrunner.engines.maxt import MaxTResult, max_t
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.streams import stream_for
from planrunner.errors import EngineError
from planrunner.plan.schema import Plan


def max_t_families(plan: Plan, jobs: list[Job]) -> dict[int, MaxTResult]:
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
        options = [_permutation_options(m) for m in members]
        # the plan rules give every member the same resamples and exact choice
        try:
            out[j] = max_t([(m.samples, m.statistic, o.alternative) for m, o in zip(members, options)],
                           strata=first.strata, resamples=options[0].resamples, exact=options[0].exact,
                           stream=stream_for(plan.seed, "max-t:" + ",".join(fam.family)))
        except EngineError as exc:  # an engine knows only arrays: name the family as the plan does
            raise EngineError(exc.message, where=f"multiplicity[{j}] (max-t family {', '.join(fam.family)})",
                              hint=exc.hint) from None
    return out


def _permutation_options(job: Job) -> PermutationOptions:
    # the plan rules admit only permutation tests to a max-t family
    assert isinstance(job.options, PermutationOptions), job.analysis_id
    return job.options
