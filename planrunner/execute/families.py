"""The joint max-T run of each ``max-t`` family (one run on the same permutations for all members).

Part of the execute stage: `pipeline.execute_plan` calls it after `execute_all`, for a run and for
verify's re-run alike, and hands its results to `record.build.build_record` beside the analyses'
results (the record builder never runs an engine). `planned_family_computations` asks the engine's
own rule which computation each family will use (or its refusal) without drawing: `check` calls it.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TypeVar

from planrunner.compile.jobs import Job
from planrunner.engines import maxt
from planrunner.engines.maxt import Endpoint, MaxTResult
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.streams import Stream, stream_for
from planrunner.errors import EngineError
from planrunner.plan.schema import Plan

Found = TypeVar("Found")


def max_t_families(plan: Plan, jobs: list[Job], *, salt: tuple[int, ...] = ()) -> dict[int, MaxTResult]:
    """Westfall–Young max-T for every ``max-t`` family: one joint run on the same permutations.

    The family's stream is keyed by ``"max-t:" + the member ids joined by ","``, so it never shares
    draws with any analysis and does not depend on the order of the analyses in the plan. ``salt``
    extends that key (a simulated data set's, so that each data set draws its own permutations).
    """
    def run(family: list[str], endpoints: list[Endpoint], first: Job, options: PermutationOptions) -> MaxTResult:
        stream = stream_for(plan.seed, "max-t:" + ",".join(family))
        return maxt.max_t(endpoints, strata=first.strata, resamples=options.resamples, exact=options.exact,
                          stream=Stream(stream.root_seed, stream.key + salt))
    return _each_family(plan, jobs, run)


def planned_family_computations(plan: Plan, jobs: list[Job]) -> dict[int, str]:
    """The computation of each max-t family's joint run (enumeration or Monte Carlo), or its refusal
    raised and located as a run locates it, by the engine's own rule, without drawing."""
    def plan_one(family: list[str], endpoints: list[Endpoint], first: Job, options: PermutationOptions) -> str:
        return maxt.computation(endpoints, strata=first.strata, resamples=options.resamples, exact=options.exact)
    return _each_family(plan, jobs, plan_one)


def _each_family(plan: Plan, jobs: list[Job],
                 call: Callable[[list[str], list[Endpoint], Job, PermutationOptions], Found]) -> dict[int, Found]:
    """``call(member ids, endpoints, first member, its options)`` for every max-t family, by family
    index; an engine's refusal is named as the plan names the family (an engine knows only arrays)."""
    by_id = {job.analysis_id: job for job in jobs}
    out: dict[int, Found] = {}
    for j, fam in enumerate(plan.multiplicity):
        if fam.method != "max-t":
            continue
        members = [by_id[i] for i in fam.family]
        options = [_permutation_options(m) for m in members]
        # the plan rules give every member the same resamples and exact choice
        endpoints: list[Endpoint] = [(m.samples, m.statistic, o.alternative) for m, o in zip(members, options)]
        try:
            out[j] = call(list(fam.family), endpoints, members[0], options[0])
        except EngineError as exc:
            raise EngineError(exc.message, where=f"multiplicity[{j}] (max-t family {', '.join(fam.family)})",
                              hint=exc.hint) from None
    return out


def _permutation_options(job: Job) -> PermutationOptions:
    # the plan rules admit only permutation tests to a max-t family
    assert isinstance(job.options, PermutationOptions), job.analysis_id
    return job.options
