"""The Python API: typed results around the one pipeline the command line runs too."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from planrunner.errors import PlanError
from planrunner.execute.executors import Execution
from planrunner.pipeline.run import check_plan, run_plan
from planrunner.plan.schema import Plan
from planrunner.record.results import NAMES, result_rows


@dataclass(frozen=True)
class CheckedPlan:
    """A plan that passed the check: the validated plan, its file, and (when the data were read)
    the rows each dataset keeps."""

    path: Path
    plan: Plan
    sha256: str
    parameters: Mapping[str, str]
    rows: Mapping[str, int] | None  # rows used per dataset; None for a plan-only check


@dataclass(frozen=True)
class Interval:
    method: str
    level: float
    lower: float | None  # None: the end is open (a one-sided bound) or was not finite
    upper: float | None
    side: str = "two-sided"


@dataclass(frozen=True)
class AnalysisResult:
    """The numbers of one analysis, as the record holds them."""

    id: str
    method: str
    statistic: str
    estimate: float | None
    standard_error: float | None
    bias: float | None
    intervals: tuple[Interval, ...]
    p_value: float | None
    adjusted_p_values: Mapping[str, float]  # multiplicity method → adjusted p-value
    n: int | None  # rows used
    resamples: int | None
    warnings: tuple[str, ...] = ()

    @classmethod
    def of(cls, entry: Mapping[str, Any]) -> AnalysisResult:
        return cls(id=entry["id"], method=entry["method"], statistic=entry["statistic"],
                   estimate=entry.get("estimate"), standard_error=entry.get("standard_error"), bias=entry.get("bias"),
                   intervals=tuple(Interval(i["method"], i["level"], i.get("lower"), i.get("upper"),
                                            i.get("side", "two-sided")) for i in entry.get("intervals", [])),
                   p_value=entry.get("p_value"),
                   adjusted_p_values={a["method"]: a["p_value"] for a in entry.get("adjusted_p_values", [])},
                   n=sum((entry.get("n") or {}).get("groups", {}).values()) or None,
                   resamples=entry.get("resamples"),
                   warnings=tuple(w.get("message", "") for w in entry.get("warnings", [])))


@dataclass(frozen=True)
class RunResult:
    """A finished run: its folder, the record (the single source of truth) and each analysis's numbers."""

    folder: Path
    record: Mapping[str, Any]
    analyses: Mapping[str, AnalysisResult] = field(default_factory=dict)

    def __getitem__(self, analysis_id: str) -> AnalysisResult:
        try:
            return self.analyses[analysis_id]
        except KeyError:
            raise KeyError(f"no analysis '{analysis_id}' in this run; it has: {', '.join(self.analyses)}") from None

    def to_frame(self) -> Any:
        """A pandas DataFrame, one row per analysis × quantity: the columns of results.csv."""
        import pandas as pd

        return pd.DataFrame(result_rows(dict(self.record)), columns=list(NAMES))


def load(path: str | Path, *, params: Mapping[str, str] | None = None) -> CheckedPlan:
    """Read and check the plan alone (no data): `planrunner check --plan-only`."""
    outcome = check_plan(path, with_data=False, params=dict(params or {}))
    return _checked(path, outcome)


def check(path: str | Path, *, params: Mapping[str, str] | None = None,
          data_root: str | Path | None = None) -> CheckedPlan:
    """Check the plan and its data, without resampling: `planrunner check`."""
    outcome = check_plan(path, params=dict(params or {}), data_root=data_root)
    return _checked(path, outcome)


def _checked(path: str | Path, outcome: Any) -> CheckedPlan:
    rows = None if outcome.tables is None else {name: t.rows_used for name, t in outcome.tables.items()}
    return CheckedPlan(Path(path), outcome.loaded.plan, outcome.loaded.sha256, dict(outcome.parameters), rows)


def run(path: str | Path, *, out: str | Path | None = None, executor: str = "serial", workers: int = 1,
        scheduler: str | None = None, params: Mapping[str, str] | None = None, operator: str | None = None,
        lock: str | Path | None = None, refuse_deviations: bool = False, reason: str | None = None,
        history: bool = True, data_root: str | Path | None = None) -> RunResult:
    """Run every analysis and write the run folder: `planrunner run` with the same options.

    The numbers do not depend on `executor` or `workers`. The record's `command` says the run came
    from this function.
    """
    if workers < 1:
        raise PlanError(f"workers must be at least 1, got {workers}", where="planrunner.api.run")
    execution = Execution(executor=executor, workers=workers, scheduler=scheduler)
    command = ["planrunner.api.run", str(path)] + [f"{k}={v}" for k, v in (params or {}).items()]
    outcome = run_plan(path, out=out, operator=operator, command=command, params=dict(params or {}), lock=lock,
                       refuse_deviations=refuse_deviations, reason=reason, history=history, data_root=data_root,
                       execution=execution)
    record = outcome.record
    return RunResult(outcome.folder, record, {a["id"]: AnalysisResult.of(a) for a in record["analyses"]})
