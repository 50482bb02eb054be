"""The plan schema: pydantic models only (no numpy, no files).

Every model is frozen and rejects unknown keys, so the plan that runs is exactly the plan that was
written. Shape and single-field rules live here; rules that relate one part of the plan to another
(an analysis naming a dataset, a level that must be declared) are checked in `planrunner.plan.load`,
where every problem can be reported at once with its position.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator

Identifier = Annotated[str, Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")]
ColumnName = Annotated[str, Field(min_length=1, max_length=200)]
Alternative = Literal["two-sided", "greater", "less"]
Role = Literal["primary", "secondary", "sensitivity", "supplementary"]
IntervalMethod = Literal["percentile", "basic", "normal", "bca", "studentized"]
Resamples = Annotated[int, Field(ge=1, le=10_000_000)]
Confidence = Annotated[float, Field(gt=0.5, lt=1.0)]
DataFormat = Literal["csv", "tsv", "xpt", "dataset-json", "parquet", "xlsx"]
# the format a file's ending names, when the plan gives no `format` (any other ending: csv)
DATA_SUFFIXES = {".csv": "csv", ".tsv": "tsv", ".tab": "tsv", ".xpt": "xpt", ".json": "dataset-json",
                 ".parquet": "parquet", ".xlsx": "xlsx"}
MultiplicityMethod = Literal["bonferroni", "holm", "hochberg", "benjamini-hochberg", "benjamini-yekutieli", "max-t"]
# earlier spellings of plan values, refused with the new one named (never read silently)
RENAMED_KEYS = {("datasets", "keep"): "rows_where"}  # (first and last key of the path) → new key
RENAMED_VALUES = {("multiplicity", "method"): {"bh": "benjamini-hochberg", "by": "benjamini-yekutieli"}}
# the intercurrent-event strategies of ICH E9(R1) (2019), section A.3.2
Strategy = Literal["treatment policy", "hypothetical", "composite variable", "while on treatment",
                   "principal stratum"]
DecisionRule = Literal["superiority", "non-inferiority", "equivalence", "below-limit", "above-limit"]
Text = Annotated[str, Field(min_length=1, max_length=2000)]


class Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)


class Column(Strict):
    """One declared data column: its type and what values it may hold."""

    type: Literal["number", "integer", "category", "text", "boolean", "date"]
    levels: list[str] | None = None
    min: float | None = None
    max: float | None = None
    unit: str | None = None
    # the column identifies the unit a row measures (patient, device, site): rows repeating a value
    # within a group, or a value in both groups, get a warning unless clusters or pairs are declared
    identifier: bool = False

    @model_validator(mode="after")
    def _rules(self) -> Column:
        if self.identifier and self.type not in ("text", "category", "integer"):
            raise ValueError("identifier applies only to text, category and integer columns")
        if self.levels is not None:
            if self.type != "category":
                raise ValueError("levels apply only to a column of type category")
            if len(set(self.levels)) != len(self.levels) or not self.levels:
                raise ValueError("levels must be a non-empty list without repeats")
        if (self.min is not None or self.max is not None) and self.type not in ("number", "integer"):
            raise ValueError("min and max apply only to number and integer columns")
        if self.min is not None and self.max is not None and self.min > self.max:
            raise ValueError("min is larger than max")
        return self


class Derived(Strict):
    """A column computed from other columns of its dataset (``derive:``), in the row-filter language."""

    expression: Annotated[str, Field(min_length=1)]
    type: Literal["number", "boolean"] | None = None  # None: inferred from the expression
    unit: str | None = None


class Dataset(Strict):
    """A data file, the columns it must hold, and which rows are kept."""

    file: Annotated[str, Field(min_length=1)]
    format: DataFormat | None = None
    sheet: Annotated[str, Field(min_length=1)] | None = None  # the sheet of an .xlsx workbook
    sha256: Annotated[str, Field(pattern=r"^[0-9a-f]{64}$")] | None = None
    columns: Annotated[dict[ColumnName, Column], Field(min_length=1)]
    missing: Literal["refuse", "drop"] = "refuse"
    missing_values: list[str] = Field(default_factory=lambda: ["", "NA"])
    # a row filter: the rows every analysis of the dataset uses (others are excluded and counted)
    rows_where: Annotated[str, Field(min_length=1)] | None = None
    # analysis sets: named row selections (conditions) of the rows kept, chosen per analysis by `set`
    sets: dict[Identifier, Annotated[str, Field(min_length=1)]] = Field(default_factory=dict)
    # header columns the plan does not declare: ignored (and listed in the record), or refused by a
    # plan that wants the file to hold exactly the declared columns
    undeclared_columns: Literal["ignore", "refuse"] = "ignore"
    # columns computed from the others, in order (a derivation may use the ones before it); the short
    # form is `name: "expression"`
    derive: dict[ColumnName, Annotated[str, Field(min_length=1)] | Derived] = Field(default_factory=dict)

    def derived(self) -> dict[str, Derived]:
        """Every derivation in its long form, in the order written."""
        return {name: Derived(expression=d) if isinstance(d, str) else d for name, d in self.derive.items()}


class Groups(Strict):
    """Which column defines the groups and which levels are compared (two: first minus second)."""

    by: ColumnName
    compare: Annotated[list[str], Field(min_length=2, max_length=50)]

    @model_validator(mode="after")
    def _distinct(self) -> Groups:
        if len(set(self.compare)) != len(self.compare):
            raise ValueError("compare names the same level twice")
        return self


class Precision(Strict):
    """Resamples chosen to a stated precision instead of a fixed number (engines.precision): a
    permutation test draws blocks of 1000 until its decision at alpha has resampling risk at most
    ``decision_risk``; a bootstrap draws the number of blocks Andrews & Buchinsky's rule gives for
    ``se_relative`` and/or ``interval_end_sd``; never more than ``max_resamples``."""

    decision_risk: Annotated[float, Field(gt=0.0, le=0.1)] | None = None
    se_relative: Annotated[float, Field(gt=0.0, le=0.5)] | None = None
    interval_end_sd: Annotated[float, Field(gt=0.0)] | None = None
    max_resamples: Annotated[int, Field(ge=1000, le=10_000_000, multiple_of=1000)]

    @model_validator(mode="after")
    def _a_target(self) -> Precision:
        if self.decision_risk is None and self.se_relative is None and self.interval_end_sd is None:
            raise ValueError("give a target: decision_risk (tests), se_relative or interval_end_sd (bootstrap)")
        return self


class Defaults(Strict):
    """Settings that every analysis inherits unless it says otherwise."""

    resamples: Resamples = 9999
    confidence: Confidence = 0.95
    alternative: Alternative = "two-sided"
    # inherited by every bootstrap (with se_relative or interval_end_sd) and permutation test (with
    # decision_risk) that gives neither resamples nor precision itself
    precision: Precision | None = None


class IntercurrentEvent(Strict):
    """An event after treatment starts that affects the endpoint, and how the estimand handles it."""

    event: Text
    strategy: Strategy


class Estimand(Strict):
    """What is to be estimated, by the five attributes of ICH E9(R1) (free text, as written)."""

    population: Text
    treatment: Text
    endpoint: Text
    intercurrent_events: list[IntercurrentEvent] = Field(default_factory=list)
    summary: Text


class Decision(Strict):
    """The pre-specified rule that turns the analysis's numbers into a verdict.

    ``margin`` for superiority (default 0) and non-inferiority, ``limits: [low, high]`` for
    equivalence, ``limit`` for below-limit and above-limit; the direction of benefit comes from the
    analysis (``planrunner.plan.decisions``).
    """

    rule: DecisionRule
    margin: float | None = None
    limits: Annotated[list[float], Field(min_length=2, max_length=2)] | None = None
    limit: float | None = None

    @model_validator(mode="after")
    def _keys_of_the_rule(self) -> Decision:
        wanted = {"superiority": "margin", "non-inferiority": "margin", "equivalence": "limits",
                  "below-limit": "limit", "above-limit": "limit"}[self.rule]
        for key in ("margin", "limits", "limit"):
            if key != wanted and getattr(self, key) is not None:
                raise ValueError(f"{key} does not apply to rule {self.rule} (it takes {wanted})")
        if self.rule != "superiority" and getattr(self, wanted) is None:
            raise ValueError(f"rule {self.rule} needs {wanted}"
                             + (": [LOW, HIGH]" if wanted == "limits" else ": VALUE"))
        if self.limits is not None and not self.limits[0] < self.limits[1]:
            raise ValueError("limits must be [LOW, HIGH] with LOW below HIGH")
        return self


class AnalysisBase(Strict):
    id: Identifier
    title: str | None = None
    # left out: primary, as before estimands existed (plan/roles.py: at most one primary per estimand)
    role: Role = "primary"
    estimand: Identifier | None = None  # a name under the plan's estimands
    decision: Decision | None = None  # the pre-specified rule (plan/decisions.py)
    data: Identifier
    outcome: ColumnName
    predictor: ColumnName | None = None
    groups: Groups | None = None
    strata: ColumnName | None = None
    set: Identifier | None = None  # one of the dataset's `sets`: the analysis uses only its rows
    # the design, declared once; each method derives its resampling scheme from it
    pairs: ColumnName | None = None  # rows sharing a value are one unit measured under each group
    clusters: ColumnName | None = None  # rows sharing a value are one randomised/sampled unit
    order: ColumnName | None = None  # time order of the rows (dependent data)
    covariates: Annotated[list[ColumnName], Field(min_length=1)] | None = None
    statistic: Annotated[str, Field(min_length=1)]
    # parameters of a statistic (each statistic says which one it takes, if any)
    quantile: Annotated[float, Field(gt=0.0, lt=1.0)] | None = None  # level of quantile statistics
    trim: Annotated[float, Field(ge=0.0, lt=0.5)] | None = None  # proportion cut from each end
    # censored outcomes (Kaplan–Meier statistics, log-rank): the 0/1 column saying whether the event
    # was observed (right censoring) or the value detected (left censoring, below a reported limit)
    event: ColumnName | None = None
    censoring: Literal["right", "left"] | None = None
    at: Annotated[float, Field(gt=0.0, allow_inf_nan=False)] | None = None  # time of survival_at
    horizon: Annotated[float, Field(gt=0.0, allow_inf_nan=False)] | None = None  # horizon of the RMST


class Blocks(Strict):
    """Block resampling of time-ordered rows (with `order`)."""

    scheme: Literal["moving", "circular", "stationary"]
    length: Annotated[int, Field(ge=1, le=1_000_000)]  # block length; the mean length for stationary


class BootstrapAnalysis(AnalysisBase):
    method: Literal["bootstrap"]
    resamples: Resamples | None = None
    precision: Precision | None = None
    confidence: Confidence | None = None
    intervals: Annotated[list[IntervalMethod], Field(min_length=1)] = Field(
        default_factory=lambda: list[IntervalMethod](["percentile", "bca"]))
    studentized_se: Literal["analytic", "jackknife", "bootstrap", "model"] | None = None
    # None: the engine's default (`engines.bootstrap.BootstrapOptions`)
    inner_resamples: Annotated[int, Field(ge=10, le=10_000)] | None = None  # nested bootstrap only
    on_degenerate: Literal["fail", "percentile", "estimate-only"] | None = None
    blocks: Blocks | None = None
    parametric: Literal["normal", "exponential", "poisson", "binomial"] | None = None
    trials: Annotated[int, Field(ge=1)] | None = None
    exhaustive: bool = False
    save_distribution: bool = False  # write every replicate (and exhaustive weight) into the record
    # one-sided confidence bounds: greater gives lower bounds, less upper bounds; never inherited
    # from defaults.alternative (which is for the permutation-type tests), so that a plan written
    # before bounds existed keeps its two-sided intervals
    alternative: Alternative | None = None
    # a stated null value of the statistic: the record gets its p-value, by inverting the first
    # listed interval's one-sided bounds (consistent with `alternative`)
    null_value: Annotated[float, Field(allow_inf_nan=False)] | None = None
    # model statistics only (engines/modelboot.py): how the model's data are resampled, the wild
    # weights, whether the null is imposed (a p-value), and which regression `coefficient` reads
    model_resampling: Literal["cases", "residual", "wild", "wild-cluster"] | None = None
    weights: Literal["rademacher", "mammen"] | None = None
    impose_null: bool | None = None
    model: Literal["linear", "logistic"] | None = None

    @model_validator(mode="after")
    def _unique_intervals(self) -> BootstrapAnalysis:
        if len(set(self.intervals)) != len(self.intervals):
            raise ValueError("intervals names a method twice")
        return self


class PermutationAnalysis(AnalysisBase):
    method: Literal["permutation"]
    resamples: Resamples | None = None
    precision: Precision | None = None
    alternative: Alternative | None = None
    exact: Literal["auto", "always", "never"] = "auto"
    two_sided: Literal["doubled", "absolute"] = "doubled"  # doubled: 2·min(p_greater, p_less)
    intervals: Annotated[list[Literal["shift"]], Field(min_length=1, max_length=1)] | None = None
    confidence: Confidence | None = None
    # with covariates: whose residuals are permuted (engines/association.py); None: freedman-lane
    covariate_permutation: Literal["freedman-lane", "ter-braak"] | None = None


class JackknifeAnalysis(AnalysisBase):
    method: Literal["jackknife"]


Analysis = Annotated[
    BootstrapAnalysis | PermutationAnalysis | JackknifeAnalysis,
    Field(discriminator="method"),
]
METHODS = ("bootstrap", "permutation", "jackknife")
METHOD_MODELS: dict[str, type[AnalysisBase]] = {"bootstrap": BootstrapAnalysis, "permutation": PermutationAnalysis,
                                                "jackknife": JackknifeAnalysis}


class MultiplicityFamily(Strict):
    """Analyses whose p-values are adjusted together."""

    family: Annotated[list[Identifier], Field(min_length=2)]
    method: MultiplicityMethod


class Parameter(Strict):
    """A named value given on the command line and used only in data file paths and titles."""

    type: Literal["text", "integer", "date", "month"] = "text"
    pattern: Annotated[str, Field(min_length=1)] | None = None  # the whole value must match
    values: Annotated[list[str], Field(min_length=1)] | None = None  # the allowed values
    default: str | None = None
    description: str | None = None


class ReportOptions(Strict):
    bins: Annotated[int, Field(ge=5, le=200)] = 40
    note: str | None = None


class Plan(Strict):
    """A whole analysis plan, as written."""

    plan: Identifier
    title: Annotated[str, Field(min_length=1, max_length=300)]
    seed: Annotated[int, Field(ge=0, lt=2**63)]
    description: str | None = None
    defaults: Defaults = Field(default_factory=Defaults)
    datasets: Annotated[dict[Identifier, Dataset], Field(min_length=1)]
    analyses: Annotated[list[Analysis], Field(min_length=1, max_length=500)]
    multiplicity: list[MultiplicityFamily] = Field(default_factory=list)
    report: ReportOptions = Field(default_factory=ReportOptions)
    parameters: dict[Annotated[str, Field(pattern=r"^[A-Za-z_][A-Za-z0-9_]{0,63}$")], Parameter] = Field(
        default_factory=dict)
    estimands: dict[Identifier, Estimand] = Field(default_factory=dict)


def precision_of(analysis: BootstrapAnalysis | PermutationAnalysis, defaults: Defaults) -> Precision | None:
    """The precision target an analysis runs to: its own, else the plan's default when the analysis
    gives no resamples and the default has a target for its method; None: a fixed resamples."""
    if analysis.precision is not None:
        return analysis.precision
    inherited = defaults.precision
    if analysis.resamples is not None or inherited is None:
        return None
    own = (inherited.decision_risk is not None if analysis.method == "permutation"
           else inherited.se_relative is not None or inherited.interval_end_sd is not None)
    return inherited if own else None
