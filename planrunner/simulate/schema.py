"""The scenarios file's schema: pydantic models only (shape and single-field rules; the rules that
relate the file to its plan are in `planrunner.simulate.checks`)."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import Field

from planrunner.plan.schema import ColumnName, Identifier, Strict

Number = Annotated[float, Field(allow_inf_nan=False)]
MAX_ROWS = 1_000_000  # rows of one simulated data set
MAX_REPLICATES = 100_000  # data sets of one scenario


class Distribution(Strict):
    """A column's family and its parameters (which ones a family takes: simulate/families.py)."""

    family: Literal["normal", "lognormal", "gamma", "bernoulli", "binomial", "poisson", "exponential", "weibull"]
    mean: Number | None = None
    sd: Number | None = None
    meanlog: Number | None = None
    sdlog: Number | None = None
    shape: Number | None = None
    scale: Number | None = None
    p: Number | None = None
    size: Annotated[int, Field(ge=1)] | None = None

    def parameters(self) -> dict[str, float]:
        return {k: float(v) for k, v in self.model_dump(exclude={"family"}, exclude_none=True).items()}


class Censoring(Strict):
    """Right censoring of a time: the observed time is min(time, censoring time)."""

    family: Literal["uniform", "exponential"]
    low: Number | None = None
    high: Number | None = None
    rate: Number | None = None

    def parameters(self) -> dict[str, float]:
        return {k: float(v) for k, v in self.model_dump(exclude={"family"}, exclude_none=True).items()}


class ColumnModel(Strict):
    model: Distribution
    by_group: dict[str, dict[str, Number]] = Field(default_factory=dict)  # level → parameters that differ
    # column → effect on the location: a number (times a modelled column's value), or per level
    # {LEVEL: EFFECT} of the column rows.groups or rows.strata fills (levels left out: 0)
    covariates: dict[ColumnName, Number | dict[str, Number]] = Field(default_factory=dict)
    censoring: Censoring | None = None
    event: ColumnName | None = None  # the plan's 0/1 column saying whether the time was observed
    icc: Number | None = None  # this column's own intraclass correlation (else rows.clusters.icc)
    frailty: Number | None = None  # a time's own gamma frailty variance (else rows.clusters.frailty)


class GroupRows(Strict):
    column: ColumnName
    sizes: Annotated[dict[str, Annotated[int, Field(ge=1, le=MAX_ROWS)]], Field(min_length=1)]


class StrataRows(Strict):
    column: ColumnName
    shares: Annotated[dict[str, Number], Field(min_length=1)]


class ClusterRows(Strict):
    column: ColumnName
    count: Annotated[int, Field(ge=1, le=MAX_ROWS)]  # clusters in each group (in all, without groups)
    icc: Number | None = None  # the intraclass correlation of the columns of icc families
    frailty: Number | None = None  # the gamma frailty variance of exponential and Weibull times


class PairRows(Strict):
    column: ColumnName
    correlation: Number


class Rows(Strict):
    count: Annotated[int, Field(ge=1, le=MAX_ROWS)] | None = None  # rows of a dataset without groups
    groups: GroupRows | None = None
    strata: StrataRows | None = None
    clusters: ClusterRows | None = None
    pairs: PairRows | None = None


class DatasetModel(Strict):
    """How one plan dataset is invented: its rows, and a model for each modelled column."""

    rows: Rows
    columns: dict[ColumnName, ColumnModel] = Field(default_factory=dict)

    def with_group_sizes(self, n: int) -> DatasetModel:
        """The same model with every group's size n (n rows in all without groups)."""
        rows = self.rows
        if rows.groups is not None:
            groups = rows.groups.model_copy(update={"sizes": dict.fromkeys(rows.groups.sizes, n)})
            return self.model_copy(update={"rows": rows.model_copy(update={"groups": groups})})
        return self.model_copy(update={"rows": rows.model_copy(update={"count": n})})


class ScenarioSpec(Strict):
    name: Identifier
    replicates: Annotated[int, Field(ge=1, le=MAX_REPLICATES)]
    description: str | None = None
    change: dict[Annotated[str, Field(min_length=1)], Any] = Field(default_factory=dict)


class Search(Strict):
    """The sample-size search: the smallest of `sizes` (rows per group, tried in order) at which the
    scenario's `analysis` reaches `power`."""

    scenario: Identifier
    analysis: Identifier
    power: Annotated[float, Field(gt=0.0, lt=1.0)]
    sizes: Annotated[list[Annotated[int, Field(ge=1, le=MAX_ROWS)]], Field(min_length=1, max_length=100)]


class ScenariosSchema(Strict):
    """The whole file, as written."""

    scenarios_for: Identifier
    title: Annotated[str, Field(min_length=1, max_length=300)]
    description: str | None = None
    seed: Annotated[int, Field(ge=0, lt=2**63)]
    datasets: Annotated[dict[Identifier, DatasetModel], Field(min_length=1)]
    scenarios: Annotated[list[ScenarioSpec], Field(min_length=1, max_length=100)]
    search: Search | None = None


