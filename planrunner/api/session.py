"""The Python API: typed results around the one pipeline the command line runs too."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from planrunner.api.progress import ProgressBar
from planrunner.errors import PlanError
from planrunner.execute.pool import Execution
from planrunner.pipeline.check import check_plan
from planrunner.pipeline.printing import write_pdf
from planrunner.pipeline.run import run_plan
from planrunner.plan.schema import Plan
from planrunner.record.permutation import count_value
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
                   resamples=count_value(entry.get("resamples")),
                   warnings=tuple(w.get("message", "") for w in entry.get("warnings", [])))


@dataclass(frozen=True)
class RunResult:
    """A finished run: its folder, the record (the single source of truth) and each analysis's numbers."""

    folder: Path
    record: Mapping[str, Any]
    analyses: Mapping[str, AnalysisResult] = field(default_factory=dict)
    history_entry: Mapping[str, Any] | None = None  # the entry appended to the run history (None: not appended)
    signed: bool = False  # the record and its history entry were signed as executed
    pdf: Path | None = None  # report-PAPER.pdf, when asked for

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
        history: bool = True, data_root: str | Path | None = None,
        progress: bool | Callable[[int, int], None] = False, pdf: bool = False, paper: str = "A4",
        sign_key: str | Path | None = None, signer: str | None = None, signers: str | Path | None = None,
        passphrase_env: str | None = None, passphrase_file: str | Path | None = None) -> RunResult:
    """Run every analysis and write the run folder: `planrunner run` with the same options.

    The numbers do not depend on `executor` or `workers`. ``progress=True`` shows the command
    line's bar on stderr (on a terminal, for runs over a second); a function ``progress(done,
    total)`` hears of finished resamples instead. ``pdf`` prints the report to report-PAPER.pdf in
    the run folder (`run --pdf --paper`); without a browser it raises before computing.
    ``sign_key`` and ``signer`` sign the record and its history entry as executed (`run --sign-key
    --signer`), the key unlocked with the passphrase in the environment variable ``passphrase_env``
    or on the first line of ``passphrase_file`` (nobody is asked for one). The record's `command`
    says the run came from this function.
    """
    from planrunner.report.pdf import PAPERS
    from planrunner.trail.signfiles import run_signing_key

    if workers < 1:
        raise PlanError(f"workers must be at least 1, got {workers}", where="planrunner.api.run")
    if paper not in PAPERS:
        raise PlanError(f"paper must be one of {', '.join(PAPERS)}, got {paper!r}", where="planrunner.api.run")
    execution = Execution(executor=executor, workers=workers, scheduler=scheduler)
    if pdf:  # no browser: say so before computing anything, as `run --pdf` does
        from planrunner.report.pdf import find_browser
        find_browser()
    signing = run_signing_key(sign_key, signer, passphrase_env=passphrase_env, passphrase_file=passphrase_file)
    command = ["planrunner.api.run", str(path)] + [f"{k}={v}" for k, v in (params or {}).items()]
    bar = ProgressBar() if progress is True else None
    hook = bar if bar is not None else progress if callable(progress) else None
    try:
        outcome = run_plan(path, out=out, operator=operator, command=command, params=dict(params or {}), lock=lock,
                           refuse_deviations=refuse_deviations, reason=reason, history=history,
                           data_root=data_root, execution=execution, progress=hook, signing=signing,
                           signers=signers)
    finally:
        if bar is not None:
            bar.close()
    written = write_pdf(outcome.folder, paper) if pdf else None
    record = outcome.record
    return RunResult(outcome.folder, record, {a["id"]: AnalysisResult.of(a) for a in record["analyses"]},
                     history_entry=outcome.history_entry, signed=outcome.signed, pdf=written)
