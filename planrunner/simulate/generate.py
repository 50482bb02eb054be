"""Drawing one data set of a dataset's model (README, "The scenarios file").

`generate(model, dataset, rng)` gives one array per declared column of the plan's dataset, typed as the
data stage holds read columns (number: float64, integer: int64, boolean: bool, category and text:
object arrays of str, date: datetime64[D]). The rows are laid out without randomness (groups in the
plan's level order, strata by largest remainder, clusters and pairs in blocks); each modelled column
draws from its own generator, keyed by its name below one draw of `rng`, so the numbers of a column do
not depend on the order the file lists the columns in, nor on the other columns, apart from its
covariates.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from planrunner.engines.streams import analysis_key
from planrunner.errors import PlanError
from planrunner.plan.schema import Column, Dataset
from planrunner.simulate.families import FAMILIES, Family, cluster_effect
from planrunner.simulate.schema import ColumnModel, DatasetModel, Rows

Parameters = dict[str, np.ndarray]


@dataclass(frozen=True)
class Layout:
    """Which group, stratum, cluster and pair each row belongs to (None: the part is not modelled)."""

    rows: int
    group: np.ndarray | None  # index into `group_levels`
    group_levels: tuple[str, ...]
    stratum: np.ndarray | None
    strata_levels: tuple[str, ...]
    cluster: np.ndarray | None  # 0 .. clusters-1, numbered across groups
    clusters: int
    pair: np.ndarray | None  # 0 .. pairs-1; the pair's rows share the index
    member: np.ndarray | None  # 0 for the pair's row in the first group, 1 in the second


def generate(model: DatasetModel, dataset: Dataset, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """One simulated data set: an array per declared column of `dataset` (the plan's spec)."""
    layout = row_layout(model.rows, dataset.columns)
    entropy = [int(k) for k in rng.integers(0, 2**63, size=2)]  # the one draw from `rng`
    out: dict[str, np.ndarray] = {}
    for name in draw_order(model):
        spec = model.columns[name]
        values, event = draw_column(name, spec, layout, model.rows, out, _column_generator(entropy, name),
                                    _column_generator(entropy, name, CLUSTER_STREAM))
        out[name] = _typed(values, dataset.columns[name])
        if spec.event is not None and event is not None:
            out[spec.event] = _typed(event, dataset.columns[spec.event])
    out.update(_rows_columns(model.rows, layout, dataset.columns))
    for name, column in dataset.columns.items():
        if name not in out:
            out[name] = _filler(name, column, layout.rows)
    return {name: out[name] for name in dataset.columns}


# the child of a column's stream that draws its cluster effects (gamma, binomial, exponential, Weibull),
# so each cluster's effect depends on the cluster's number only, not on how many rows were drawn
CLUSTER_STREAM = analysis_key("cluster effects")


def _column_generator(entropy: list[int], name: str, *labels: int) -> np.random.Generator:
    key = (analysis_key(name), *labels)
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(entropy=entropy, spawn_key=key)))


def draw_order(model: DatasetModel) -> list[str]:
    """The modelled columns, each after its covariates, ties by name (never by the file's order)."""
    done: list[str] = []
    pending = sorted(model.columns)
    while pending:
        ready = [n for n in pending if all(c in done for c in model.columns[n].covariates if c in model.columns)]
        if not ready:  # a circle, which the checks refuse before any draw
            raise ValueError(f"the covariates of {', '.join(pending)} go round in a circle")
        done.append(ready[0])
        pending.remove(ready[0])
    return done


# --- rows -----------------------------------------------------------------------------------------

def ordered_levels(labels: Mapping[str, object], column: Column) -> tuple[str, ...]:
    """Levels in the plan's order (declared levels; false before true; numbers ascending; else by text)."""
    if column.levels is not None:
        return tuple(level for level in column.levels if level in labels)
    if column.type == "boolean":
        return tuple(level for level in ("false", "true") if level in labels)
    if column.type == "integer":
        return tuple(sorted(labels, key=int))
    return tuple(sorted(labels))


def largest_remainder(total: int, shares: list[float]) -> np.ndarray:
    """Counts summing to `total`, each the floor of total·share plus one for the largest fractional
    parts (ties: the earlier share), so every count is within one of its exact quota."""
    quotas = np.array([total * s for s in shares])
    counts = np.floor(quotas).astype(np.int64)
    short = total - int(counts.sum())
    order = np.argsort(-(quotas - counts), kind="stable")
    counts[order[:short]] += 1
    return counts


def row_layout(rows: Rows, columns: Mapping[str, Column]) -> Layout:
    if rows.groups is not None:
        levels = ordered_levels(rows.groups.sizes, columns[rows.groups.column])
        sizes = [rows.groups.sizes[level] for level in levels]
    else:
        levels, sizes = (), [int(rows.count or 0)]
    group = np.repeat(np.arange(len(sizes)), sizes)
    stratum, strata_levels, shares = None, tuple[str, ...](), list[float]()
    if rows.strata is not None:
        strata_levels = ordered_levels(rows.strata.shares, columns[rows.strata.column])
        shares = [rows.strata.shares[level] for level in strata_levels]
        stratum = np.concatenate([np.repeat(np.arange(len(shares)), largest_remainder(n, shares)) for n in sizes])
    cluster, count = None, 0
    if rows.clusters is not None:
        count = rows.clusters.count
        # each group's rows in `count` consecutive blocks whose sizes differ by at most one
        within = [np.arange(n) * count // n for n in sizes]
        cluster = np.concatenate([g * count + k for g, k in enumerate(within)])
        if rows.strata is not None:
            # clusters nested in strata: the shares apply to each group's clusters, and a row is in
            # its cluster's stratum
            cluster_stratum = cluster_strata(count, shares)
            stratum = np.concatenate([cluster_stratum[k] for k in within])
    pair = member = None
    if rows.pairs is not None:
        pair = np.concatenate([np.arange(n) for n in sizes])
        member = group.copy()
    return Layout(rows=int(sum(sizes)), group=group if rows.groups is not None else None, group_levels=levels,
                  stratum=stratum, strata_levels=strata_levels, cluster=cluster, clusters=count * len(sizes),
                  pair=pair, member=member)


def cluster_strata(count: int, shares: list[float]) -> np.ndarray:
    """The stratum of each of a group's `count` clusters: the largest-remainder counts of clusters
    for the shares, strata in the plan's level order."""
    return np.repeat(np.arange(len(shares)), largest_remainder(count, shares))


def _labels_as(labels: np.ndarray, column: Column) -> np.ndarray:
    """Level names as the column's values."""
    if column.type == "boolean":
        return labels == "true"
    if column.type == "integer":
        return labels.astype(np.int64)
    return labels.astype(object)


def _identifiers(name: str, index: np.ndarray, column: Column, count: int) -> np.ndarray:
    """1-based identifiers: numbers for an integer column, else 'name-001' (zero-padded to sort)."""
    if column.type == "integer":
        return (index + 1).astype(np.int64)
    width = len(str(max(count, 1)))
    return np.array([f"{name}-{i + 1:0{width}d}" for i in index.tolist()], dtype=object)


def _rows_columns(rows: Rows, layout: Layout, columns: Mapping[str, Column]) -> dict[str, np.ndarray]:
    out = {}
    if rows.groups is not None and layout.group is not None:
        labels = np.array(layout.group_levels, dtype=object)[layout.group]
        out[rows.groups.column] = _labels_as(labels, columns[rows.groups.column])
    if rows.strata is not None and layout.stratum is not None:
        labels = np.array(layout.strata_levels, dtype=object)[layout.stratum]
        out[rows.strata.column] = _labels_as(labels, columns[rows.strata.column])
    if rows.clusters is not None and layout.cluster is not None:
        out[rows.clusters.column] = _identifiers(rows.clusters.column, layout.cluster,
                                                 columns[rows.clusters.column], layout.clusters)
    if rows.pairs is not None and layout.pair is not None:
        out[rows.pairs.column] = _identifiers(rows.pairs.column, layout.pair, columns[rows.pairs.column],
                                              int(layout.pair.max(initial=0)) + 1)
    return out


def _filler(name: str, column: Column, n: int) -> np.ndarray:
    """A column no analysis or filter uses and nothing models: text gets sequential identifiers, the
    rest one constant (README: the declared min or 0, false, the first level, 1970-01-01)."""
    if column.type == "text":
        return _identifiers(name, np.arange(n), column, n)
    if column.type == "category":
        return np.full(n, column.levels[0] if column.levels else "", dtype=object)
    if column.type == "boolean":
        return np.zeros(n, dtype=bool)
    if column.type == "date":
        return np.full(n, np.datetime64("1970-01-01"), dtype="datetime64[D]")
    value = column.min if column.min is not None else (min(0.0, column.max) if column.max is not None else 0.0)
    return np.full(n, value, dtype=np.int64 if column.type == "integer" else float)


def _typed(values: np.ndarray, column: Column) -> np.ndarray:
    if column.type == "boolean":
        return values.astype(bool)
    if column.type == "integer":
        return np.rint(values).astype(np.int64)
    return values.astype(float)


# --- one column -----------------------------------------------------------------------------------

def row_parameters(spec: ColumnModel, layout: Layout, rows: Rows, drawn: Mapping[str, np.ndarray]) -> Parameters:
    """Each parameter per row: the model's, a group's override, then the covariates on the location."""
    family = FAMILIES[spec.model.family]
    parameters = {k: np.full(layout.rows, v) for k, v in spec.model.parameters().items()}
    for g, level in enumerate(layout.group_levels):
        assert layout.group is not None
        for key, value in spec.by_group.get(level, {}).items():
            parameters[key][layout.group == g] = value
    if spec.covariates:
        predictor = np.zeros(layout.rows)
        for name, effect in sorted(spec.covariates.items()):
            predictor += (_level_effects(name, effect, layout, rows) if isinstance(effect, dict)
                          else effect * drawn[name].astype(float))
        parameters[family.location] = _moved(family, parameters[family.location], predictor)
    return parameters


def _level_effects(column: str, effects: Mapping[str, float], layout: Layout, rows: Rows) -> np.ndarray:
    """Each row's effect of its group's or stratum's level (0 for a level not listed)."""
    if rows.groups is not None and rows.groups.column == column:
        levels, index = layout.group_levels, layout.group
    else:
        levels, index = layout.strata_levels, layout.stratum
    assert index is not None
    return np.array([effects.get(level, 0.0) for level in levels])[index]


def _moved(family: Family, location: np.ndarray, predictor: np.ndarray) -> np.ndarray:
    """The location with the linear predictor added on the family's own scale."""
    with np.errstate(over="ignore", divide="ignore"):
        if family.link == "identity":
            return location + predictor
        if family.link == "log":
            return location * np.exp(predictor)
        from scipy.special import expit, logit

        return expit(logit(location) + predictor)


def draw_column(name: str, spec: ColumnModel, layout: Layout, rows: Rows, drawn: Mapping[str, np.ndarray],
                rng: np.random.Generator,
                cluster_rng: np.random.Generator | None = None) -> tuple[np.ndarray, np.ndarray | None]:
    """The column's values, and (with censoring) whether each time was observed. `rng` draws the rows;
    `cluster_rng` the cluster effects of the families added later (gamma, binomial, exponential, Weibull:
    a stream of its own); normal, lognormal, bernoulli and poisson draw theirs from `rng`, first, as
    they always have, so their numbers stay as recorded."""
    family = FAMILIES[spec.model.family]
    parameters = row_parameters(spec, layout, rows, drawn)
    effect = cluster_effect(family, spec, rows.clusters)
    if rows.pairs is not None and rows.pairs.correlation != 0:
        values = from_scores(family, parameters, _paired_scores(layout, rows.pairs.correlation, rng))
    elif effect.value > 0 and family.name in SHARED_STREAM_CLUSTERS:
        values = _clustered(family, parameters, layout, effect.value, rng)
    elif effect.value > 0:
        values = _clustered_apart(family, parameters, layout, effect.value, rng, cluster_rng or rng)
    else:
        values = _independent(family, parameters, layout.rows, rng)
    if not np.isfinite(values).all():  # e.g. a covariate effect that overflows exp()
        raise PlanError(f"the model of column '{name}' gives values that are not finite numbers",
                        where=f"scenarios: columns.{name}",
                        hint="check its parameters and covariate effects (a location far beyond the data's scale)")
    if spec.censoring is None:
        return values, None
    c = spec.censoring.parameters()
    if spec.censoring.family == "uniform":
        censor = rng.uniform(c["low"], c["high"], layout.rows)
    else:
        censor = rng.exponential(1.0 / c["rate"], layout.rows)
    return np.minimum(values, censor), values <= censor


def _independent(family: Family, p: Parameters, n: int, rng: np.random.Generator) -> np.ndarray:
    name = family.name
    if name == "normal":
        return rng.normal(p["mean"], p["sd"], n)
    if name == "lognormal":
        return rng.lognormal(p["meanlog"], p["sdlog"], n)
    if name == "gamma":
        return rng.gamma(p["shape"], p["scale"], n)
    if name == "bernoulli":
        return (rng.random(n) < p["p"]).astype(float)
    if name == "binomial":
        return rng.binomial(p["size"].astype(np.int64), p["p"], n).astype(float)
    if name == "poisson":
        return rng.poisson(p["mean"], n).astype(float)
    if name == "exponential":
        return rng.exponential(p["mean"], n)
    return p["scale"] * rng.weibull(p["shape"], n)


def from_scores(family: Family, p: Parameters, z: np.ndarray) -> np.ndarray:
    """The family's value whose distribution function at it is Φ(z): a monotone map of standard
    normal scores (a normal's mean + sd·z; a lognormal's exp of that; the quantile of Φ(z) for the
    rest, from the upper tail where that keeps precision)."""
    from scipy import special, stats

    name = family.name
    if name == "normal":
        return p["mean"] + p["sd"] * z
    if name == "lognormal":
        return np.exp(p["meanlog"] + p["sdlog"] * z)
    if name == "bernoulli":
        return (z < special.ndtri(p["p"])).astype(float)
    upper = special.ndtr(-z)  # 1 − Φ(z)
    if name == "gamma":
        return p["scale"] * special.gammainccinv(p["shape"], upper)
    if name == "exponential":
        return p["mean"] * -np.log(upper)
    if name == "weibull":
        return p["scale"] * (-np.log(upper)) ** (1.0 / p["shape"])
    if name == "binomial":
        return stats.binom.isf(upper, p["size"], p["p"])
    return stats.poisson.isf(upper, p["mean"])


def _paired_scores(layout: Layout, correlation: float, rng: np.random.Generator) -> np.ndarray:
    """Standard normal scores, correlated `correlation` within each pair (bivariate normal)."""
    assert layout.pair is not None and layout.member is not None
    pairs = int(layout.pair.max(initial=-1)) + 1
    first, second = rng.standard_normal(pairs), rng.standard_normal(pairs)
    other = correlation * first + math.sqrt(1.0 - correlation**2) * second
    return np.where(layout.member == 0, first[layout.pair], other[layout.pair])


def _clustered(family: Family, p: Parameters, layout: Layout, icc: float, rng: np.random.Generator) -> np.ndarray:
    """Values whose intraclass correlation (the correlation of two rows of one cluster) is `icc`:
    normal and lognormal: a random intercept on the (log) scale, with the stated sd the total one;
    bernoulli: a cluster probability drawn from the beta distribution with mean p and
    1/(a+b+1) = icc (beta-binomial); poisson: a cluster rate multiplier drawn from the gamma
    distribution with mean 1 and variance icc/((1−icc)·mean) (so the counts' variance is mean/(1−icc))."""
    from scipy import special

    assert layout.cluster is not None
    n = layout.rows
    if family.name in ("normal", "lognormal"):
        shared = rng.standard_normal(layout.clusters)[layout.cluster]
        z = math.sqrt(icc) * shared + math.sqrt(1.0 - icc) * rng.standard_normal(n)
        return from_scores(family, p, z)
    shared = rng.random(layout.clusters)[layout.cluster]
    if family.name == "bernoulli":
        return (rng.random(n) < _beta_probability(p["p"], icc, shared)).astype(float)
    if family.name == "poisson":
        k = p["mean"] * (1 - icc) / icc
        return rng.poisson(p["mean"] * special.gammaincinv(k, shared) / k).astype(float)
    raise ValueError(f"no cluster effect is defined for {family.name} here")


SHARED_STREAM_CLUSTERS = ("normal", "lognormal", "bernoulli", "poisson")  # `_clustered`


def _beta_probability(prob: np.ndarray, icc: float, shared: np.ndarray) -> np.ndarray:
    """Each row's cluster probability: the quantile at the cluster's uniform of the beta distribution
    with mean p and 1/(a + b + 1) = icc (a = p(1 − icc)/icc, b = (1 − p)(1 − icc)/icc), so the trials
    of one cluster correlate icc (the beta-binomial model). p of 0 or 1 has no spread to share."""
    from scipy import special

    inner = (prob > 0) & (prob < 1)
    a = np.where(inner, prob, 0.5) * (1 - icc) / icc
    b = np.where(inner, 1 - prob, 0.5) * (1 - icc) / icc
    return np.where(inner, special.betaincinv(a, b, shared), prob)


def _clustered_apart(family: Family, p: Parameters, layout: Layout, effect: float, rng: np.random.Generator,
                     cluster_rng: np.random.Generator) -> np.ndarray:
    """The cluster effects drawn from their own stream (one uniform, or one gamma frailty, per cluster,
    in cluster order), the rows from `rng` (README: clusters):

    gamma (icc): a shared part plus the row's own part, S_c + E_i with S_c ~ Gamma(icc·shape, 1) and
    E_i ~ Gamma((1 − icc)·shape, 1), times the row's scale: each row is Gamma(shape, scale) and two rows
    of one cluster correlate icc (Cherian's bivariate gamma; S_c is the quantile of the cluster's uniform);
    binomial (icc): the cluster's probability from the beta distribution with mean p and
    1/(a + b + 1) = icc, each row Binomial(size, that probability) (beta-binomial rows);
    exponential and Weibull (frailty θ): the hazard of every row of a cluster is multiplied by
    Z_c ~ Gamma(1/θ, θ) (mean 1, variance θ): T = Λ⁻¹(E/Z_c) with E standard exponential."""
    from scipy import special

    assert layout.cluster is not None
    n, name = layout.rows, family.name
    if name == "gamma":
        shared = cluster_rng.random(layout.clusters)[layout.cluster]
        common = special.gammaincinv(effect * p["shape"], shared)
        return p["scale"] * (common + rng.gamma((1.0 - effect) * p["shape"], 1.0, n))
    if name == "binomial":
        shared = cluster_rng.random(layout.clusters)[layout.cluster]
        return rng.binomial(p["size"].astype(np.int64), _beta_probability(p["p"], effect, shared)).astype(float)
    frailty = cluster_rng.gamma(1.0 / effect, effect, layout.clusters)[layout.cluster]
    with np.errstate(divide="ignore", over="ignore"):
        cumulative = rng.standard_exponential(n) / frailty  # Λ(T): the row's cumulative hazard at its time
        if name == "exponential":
            return p["mean"] * cumulative
        if name == "weibull":
            return p["scale"] * cumulative ** (1.0 / p["shape"])
    raise ValueError(f"no cluster effect is defined for {name}")
