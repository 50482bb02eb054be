"""Simulated data sets against the families' exact distributions (V-SIMGEN; scipy.stats as the reference), the
dependence the scenarios file states (intraclass and pair correlation, by their definitions), censoring
shares against their exact integrals, covariate effects on each family's scale, and the draw contract
(same generator, same bytes; the file's column order changes nothing)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, special, stats

from planrunner.errors import PlanError
from planrunner.plan.schema import Column, Dataset
from planrunner.simulate.generate import generate, largest_remainder
from planrunner.simulate.schema import (
    Censoring,
    ClusterRows,
    ColumnModel,
    DatasetModel,
    Distribution,
    GroupRows,
    PairRows,
    Rows,
    StrataRows,
)

N = 60_000  # rows for moment and shape checks
SEED = 20261203
# (family, parameters, the scipy reference distribution, a column type that holds it)
FAMILIES = [
    ("normal", {"mean": 10.0, "sd": 2.0}, stats.norm(10, 2), "number"),
    ("lognormal", {"meanlog": 1.0, "sdlog": 0.5}, stats.lognorm(s=0.5, scale=np.e), "number"),
    ("gamma", {"shape": 2.0, "scale": 3.0}, stats.gamma(a=2.0, scale=3.0), "number"),
    ("bernoulli", {"p": 0.3}, stats.bernoulli(0.3), "integer"),
    ("binomial", {"size": 10, "p": 0.3}, stats.binom(10, 0.3), "integer"),
    ("poisson", {"mean": 4.0}, stats.poisson(4.0), "integer"),
    ("exponential", {"mean": 5.0}, stats.expon(scale=5.0), "number"),
    ("weibull", {"shape": 1.5, "scale": 2.0}, stats.weibull_min(c=1.5, scale=2.0), "number"),
]
DISCRETE = ("bernoulli", "binomial", "poisson")


def _dataset(**types: str) -> Dataset:
    return Dataset(file="x.csv", columns={name: Column(type=kind) for name, kind in types.items()})  # type: ignore


def _generate(rows: Rows, columns: dict[str, ColumnModel], dataset: Dataset, seed: int = SEED) -> dict:
    return generate(DatasetModel(rows=rows, columns=columns), dataset, np.random.default_rng(seed))


def _column(family: str, n: int = N, column_type: str = "number", **parameters) -> np.ndarray:
    model = {"y": ColumnModel(model=Distribution(family=family, **parameters))}
    return _generate(Rows(count=n), model, _dataset(y=column_type))["y"]


def _paired(family: str, parameters: dict, column_type: str, correlation: float, n: int = N) -> dict:
    """n pairs: one row of each pair in group a (first), one in group b."""
    rows = Rows(groups=GroupRows(column="arm", sizes={"a": n, "b": n}),
                pairs=PairRows(column="pair", correlation=correlation))
    dataset = Dataset(file="x.csv", columns={"arm": Column(type="category", levels=["a", "b"]),
                                             "pair": Column(type="integer"), "y": Column(type=column_type)})
    return _generate(rows, {"y": ColumnModel(model=Distribution(family=family, **parameters))}, dataset)


def _clustered(family: str, parameters: dict, column_type: str, icc: float, clusters: int = 30_000) -> np.ndarray:
    """Values of `clusters` clusters of two rows each, shape (clusters, 2)."""
    rows = Rows(count=2 * clusters, clusters=ClusterRows(column="site", count=clusters, icc=icc))
    out = _generate(rows, {"y": ColumnModel(model=Distribution(family=family, **parameters))},
                    _dataset(site="text", y=column_type))
    assert (out["site"][0::2] == out["site"][1::2]).all() and out["site"][0] != out["site"][2]
    return out["y"].astype(float).reshape(clusters, 2)


def _within_pair_correlation(values: np.ndarray) -> float:
    """Pearson's correlation of the two members, each pair counted in both orders (exchangeable members:
    the intraclass correlation's definition, the correlation of two rows of one cluster)."""
    first = np.concatenate([values[:, 0], values[:, 1]])
    second = np.concatenate([values[:, 1], values[:, 0]])
    return float(np.corrcoef(first, second)[0, 1])


def _assert_distribution(y: np.ndarray, family: str, reference) -> None:
    """Shape: Kolmogorov–Smirnov against the reference CDF (continuous), a chi-square test of the
    counts against the reference pmf with cells of at least 5 expected (discrete)."""
    if family not in DISCRETE:
        assert stats.kstest(y, reference.cdf).pvalue > 1e-3  # scipy reference
        return
    values = y.astype(np.int64)
    top = int(reference.ppf(1 - 1e-6))
    counts = np.bincount(np.minimum(values, top), minlength=top + 1)[: top + 1]
    expected = reference.pmf(np.arange(top + 1)) * y.size
    expected[-1] += reference.sf(top) * y.size  # the last cell holds the upper tail
    keep = expected >= 5
    observed = np.append(counts[keep], counts[~keep].sum())
    expected = np.append(expected[keep], expected[~keep].sum())
    if expected[-1] < 5:
        observed[-2] += observed[-1]
        expected[-2] += expected[-1]
        observed, expected = observed[:-1], expected[:-1]
    assert stats.chisquare(observed, expected).pvalue > 1e-3  # scipy reference


@pytest.mark.parametrize(("family", "parameters", "reference", "column_type"), FAMILIES,
                         ids=[f[0] for f in FAMILIES])
def test_each_family_matches_its_exact_moments_and_shape(family, parameters, reference, column_type):
    y = _column(family, column_type=column_type, **parameters)
    x = y.astype(float)
    mean, var = float(reference.mean()), float(reference.var())  # scipy reference
    kurtosis = float(reference.stats(moments="k"))
    # V-TOL: 4 Monte Carlo standard deviations of the sample mean and of the sample variance
    # (sd of s² is σ²·sqrt((κ + 2)/n) with κ the excess kurtosis)
    assert abs(x.mean() - mean) < 4 * np.sqrt(var / x.size)
    assert abs(x.var(ddof=1) - var) < 4 * var * np.sqrt((kurtosis + 2) / x.size)
    _assert_distribution(x, family, reference)


@pytest.mark.parametrize(("family", "parameters", "reference", "column_type"), FAMILIES,
                         ids=[f[0] for f in FAMILIES])
def test_paired_rows_keep_each_familys_distribution(family, parameters, reference, column_type):
    """Pairs draw through correlated normal scores; each row still follows the family exactly."""
    out = _paired(family, parameters, column_type, correlation=0.5, n=N // 2)
    second = out["y"][out["arm"] == "b"].astype(float)  # the mixed scores, independent across pairs
    _assert_distribution(second, family, reference)


@pytest.mark.parametrize(("family", "parameters", "scale"), [
    ("normal", {"mean": 0.0, "sd": 3.0}, lambda v: v),
    ("lognormal", {"meanlog": 2.0, "sdlog": 0.7}, np.log),  # the correlation of the logs
])
def test_pair_correlation_is_the_stated_one_on_the_location_scale(family, parameters, scale):
    out = _paired(family, parameters, "number", correlation=0.6, n=20_000)
    first, second = scale(out["y"][out["arm"] == "a"]), scale(out["y"][out["arm"] == "b"])
    assert (out["pair"][out["arm"] == "a"] == out["pair"][out["arm"] == "b"]).all()
    r = np.corrcoef(first, second)[0, 1]
    # V-TOL: sd of Pearson's r for a bivariate normal is (1 − ρ²)/sqrt(n) (Fisher 1915, V-SIMGEN)
    assert abs(r - 0.6) < 4 * (1 - 0.6**2) / np.sqrt(first.size)


def test_pair_correlation_of_a_bernoulli_is_that_of_its_normal_scores():
    """Both rows are 1 when both scores fall below Φ⁻¹(p): the 0/1 correlation is
    (Φ₂(t, t; ρ) − p²)/(p(1 − p)) with t = Φ⁻¹(p) (the bivariate normal CDF, scipy reference)."""
    p, rho, n = 0.3, 0.6, 40_000
    out = _paired("bernoulli", {"p": p}, "boolean", correlation=rho, n=n)
    first, second = out["y"][out["arm"] == "a"], out["y"][out["arm"] == "b"]
    t = special.ndtri(p)
    both = stats.multivariate_normal(mean=[0, 0], cov=[[1, rho], [rho, 1]]).cdf([t, t])
    exact = (both - p * p) / (p * (1 - p))
    observed = np.mean(first & second)
    # V-TOL: 4 binomial standard deviations of the share of pairs with two ones
    assert abs(observed - both) < 4 * np.sqrt(both * (1 - both) / n)
    assert abs(np.corrcoef(first, second)[0, 1] - exact) < 0.03  # 4/sqrt(n) bounds the sd of r here


@pytest.mark.parametrize(("family", "parameters", "column_type", "scale"), [
    ("normal", {"mean": 5.0, "sd": 2.0}, "number", lambda v: v),
    ("lognormal", {"meanlog": 1.0, "sdlog": 0.8}, "number", np.log),
    ("bernoulli", {"p": 0.3}, "boolean", lambda v: v),
    ("poisson", {"mean": 3.0}, "integer", lambda v: v),
])
def test_intraclass_correlation_is_the_stated_one(family, parameters, column_type, scale):
    """ICC: the correlation of two rows of one cluster (README: clusters); estimated from clusters of
    two by the pairwise Pearson correlation, its Monte Carlo sd from 20 batches."""
    icc = 0.25
    values = scale(_clustered(family, parameters, column_type, icc))
    batches = [_within_pair_correlation(b) for b in np.array_split(values, 20)]
    sd = np.std(batches, ddof=1) / np.sqrt(20)
    assert abs(_within_pair_correlation(values) - icc) < 4 * sd + 1e-3  # V-TOL


def test_clustered_normal_keeps_the_stated_total_sd():
    values = _clustered("normal", {"mean": 5.0, "sd": 2.0}, "number", 0.4).ravel()
    # the sample sd of 60 000 correlated values: about 1/sqrt(30 000) relative, V-TOL 4 of those
    assert abs(values.std() / 2.0 - 1) < 4 / np.sqrt(30_000)


def test_clustered_bernoulli_keeps_p_and_poisson_is_negative_binomial():
    """A bernoulli row is still Bernoulli(p); a clustered poisson count is gamma–poisson: negative
    binomial with k = mean·(1 − icc)/icc, variance mean/(1 − icc) (scipy.stats.nbinom reference)."""
    flags = _clustered("bernoulli", {"p": 0.3}, "boolean", 0.2).ravel()
    _assert_distribution(flags[0::2], "bernoulli", stats.bernoulli(0.3))
    mean, icc = 3.0, 0.25
    counts = _clustered("poisson", {"mean": mean}, "integer", icc)[:, 0]  # one row per cluster: independent
    k = mean * (1 - icc) / icc  # the gamma–Poisson mixture (V-SIMGEN)
    reference = stats.nbinom(k, k / (k + mean))
    assert reference.var() == pytest.approx(mean / (1 - icc))  # identity
    _assert_distribution(counts, "poisson", reference)


@pytest.mark.parametrize("censoring", [Censoring(family="uniform", low=50, high=400),
                                       Censoring(family="exponential", rate=0.004)], ids=["uniform", "exponential"])
def test_weibull_censoring_share_is_its_exact_integral(censoring):
    """P(censored) = P(C < T) = ∫ f_C(c) S_T(c) dc (scipy.integrate.quad of the censoring density times
    the Weibull survival function exp(−(c/scale)^shape))."""
    shape, scale, n = 1.3, 200.0, 50_000
    model = {"days": ColumnModel(model=Distribution(family="weibull", shape=shape, scale=scale),
                                 censoring=censoring, event="failed")}
    out = _generate(Rows(count=n), model, _dataset(days="number", failed="boolean"))
    c = censoring.parameters()
    density = (stats.uniform(c["low"], c["high"] - c["low"]) if censoring.family == "uniform"
               else stats.expon(scale=1 / c["rate"]))
    survival = stats.weibull_min(c=shape, scale=scale).sf
    exact = integrate.quad(lambda t: density.pdf(t) * survival(t), *density.support())[0]
    censored = 1 - out["failed"].mean()
    assert abs(censored - exact) < 4 * np.sqrt(exact * (1 - exact) / n)  # V-TOL: binomial sd
    # an observed time is never after the censoring time, a censored one is below the event time
    assert out["days"].dtype == float and out["failed"].dtype == bool and (out["days"] > 0).all()


def test_exponential_censoring_of_an_exponential_time_has_the_closed_form_share():
    # identity: P(C < T) = rate / (rate + 1/mean) for independent exponential T and C
    mean, rate, n = 300.0, 0.002, 50_000
    model = {"t": ColumnModel(model=Distribution(family="exponential", mean=mean),
                              censoring=Censoring(family="exponential", rate=rate), event="seen")}
    out = _generate(Rows(count=n), model, _dataset(t="number", seen="integer"))
    exact = rate / (rate + 1 / mean)
    assert out["seen"].dtype == np.int64 and set(np.unique(out["seen"])) <= {0, 1}
    assert abs((1 - out["seen"].mean()) - exact) < 4 * np.sqrt(exact * (1 - exact) / n)  # V-TOL


def _with_covariate(family: str, parameters: dict, effect: float, column_type: str, n: int = N) -> dict:
    """y with a 0/1 covariate x (p 0.5): y's location moves by `effect` on its own scale where x is 1."""
    model = {"x": ColumnModel(model=Distribution(family="bernoulli", p=0.5)),
             "y": ColumnModel(model=Distribution(family=family, **parameters), covariates={"x": effect})}
    return _generate(Rows(count=n), model, _dataset(x="boolean", y=column_type))


def test_covariates_move_the_location_on_each_familys_scale():
    # normal: the mean moves by the effect; 4 standard errors of a difference of means (V-TOL)
    out = _with_covariate("normal", {"mean": 10.0, "sd": 2.0}, 1.5, "number")
    x, y = out["x"], out["y"]
    assert abs(y[x].mean() - y[~x].mean() - 1.5) < 4 * 2.0 * np.sqrt(1 / x.sum() + 1 / (~x).sum())
    # poisson and weibull: the mean is multiplied by exp(effect) (log link on mean and scale)
    for family, parameters, column_type in (("poisson", {"mean": 4.0}, "integer"),
                                            ("weibull", {"shape": 1.5, "scale": 2.0}, "number")):
        out = _with_covariate(family, parameters, np.log(1.5), column_type)
        x, y = out["x"], out["y"].astype(float)
        log_ratio = np.log(y[x].mean() / y[~x].mean())
        se = np.sqrt(y[x].var() / (x.sum() * y[x].mean() ** 2) + y[~x].var() / ((~x).sum() * y[~x].mean() ** 2))
        assert abs(log_ratio - np.log(1.5)) < 4 * se, family  # delta method, V-TOL
    # bernoulli: the log odds move by the effect
    out = _with_covariate("bernoulli", {"p": 0.3}, np.log(2.0), "boolean")
    x, y = out["x"], out["y"]
    p1, p0 = y[x].mean(), y[~x].mean()
    log_or = np.log(p1 / (1 - p1)) - np.log(p0 / (1 - p0))
    se = np.sqrt(1 / (x.sum() * p1 * (1 - p1)) + 1 / ((~x).sum() * p0 * (1 - p0)))  # Woolf's standard error (V-SIMGEN)
    assert abs(log_or - np.log(2.0)) < 4 * se


def test_rows_layout_groups_strata_clusters_and_pairs():
    rows = Rows(groups=GroupRows(column="arm", sizes={"b": 7, "a": 7}),
                strata=StrataRows(column="depot", shares={"west": 0.25, "east": 0.5, "north": 0.25}))
    dataset = Dataset(file="x.csv", columns={"arm": Column(type="category", levels=["a", "b"]),
                                             "depot": Column(type="category", levels=["north", "east", "west"]),
                                             "id": Column(type="text")})
    out = _generate(rows, {}, dataset)
    assert out["arm"].tolist() == ["a"] * 7 + ["b"] * 7  # the plan's level order, not the file's
    # largest remainder within each group: quotas 1.75, 3.5, 1.75 → 2, 3, 2 (ties to the earlier level)
    assert out["depot"][:7].tolist() == ["north"] * 2 + ["east"] * 3 + ["west"] * 2
    assert out["depot"][7:].tolist() == out["depot"][:7].tolist()
    assert out["id"][0] == "id-01" and len(set(out["id"])) == 14
    rows = Rows(groups=GroupRows(column="arm", sizes={"false": 5, "true": 5}),
                clusters=ClusterRows(column="site", count=2, icc=0.0))
    out = _generate(rows, {}, _dataset(arm="boolean", site="integer"))
    assert out["arm"].dtype == bool and out["site"].tolist() == [1, 1, 1, 2, 2, 3, 3, 3, 4, 4]


def test_largest_remainder_keeps_each_count_within_one_of_its_quota():
    # identity: counts sum to the total and each lies in [floor(quota), floor(quota) + 1]
    assert largest_remainder(10, [1 / 3, 1 / 3, 1 / 3]).tolist() == [4, 3, 3]
    assert largest_remainder(80, [0.3, 0.2, 0.3, 0.2]).tolist() == [24, 16, 24, 16]
    assert largest_remainder(7, [0.5, 0.25, 0.25]).tolist() == [3, 2, 2]  # quotas 3.5, 1.75, 1.75


def test_unused_columns_get_documented_fillers():
    dataset = Dataset(file="x.csv", columns={"when": Column(type="date"), "note": Column(type="category",
                                             levels=["x", "y"]), "dose": Column(type="number", min=2),
                                             "ok": Column(type="boolean"), "k": Column(type="integer")})
    out = _generate(Rows(count=3), {}, dataset)
    assert out["when"].dtype == np.dtype("datetime64[D]") and out["note"].tolist() == ["x"] * 3
    assert out["dose"].tolist() == [2.0] * 3 and out["ok"].tolist() == [False] * 3
    assert out["k"].dtype == np.int64


def _mixed_columns() -> dict[str, ColumnModel]:
    return {"base": ColumnModel(model=Distribution(family="normal", mean=40, sd=8)),
            "time": ColumnModel(model=Distribution(family="lognormal", meanlog=3.0, sdlog=0.9),
                                covariates={"base": 0.01}),
            "hit": ColumnModel(model=Distribution(family="bernoulli", p=0.4))}


def test_same_generator_gives_the_same_bytes_and_column_order_changes_nothing():
    dataset = _dataset(hit="boolean", time="number", base="number")
    columns = _mixed_columns()
    once = _generate(Rows(count=500), columns, dataset)
    again = _generate(Rows(count=500), columns, dataset)
    reordered = _generate(Rows(count=500), dict(reversed(list(columns.items()))), dataset)
    for name in dataset.columns:
        assert once[name].tobytes() == again[name].tobytes() == reordered[name].tobytes()
    # a column's draws do not depend on the other columns, only on its covariates
    alone = _generate(Rows(count=500), {"hit": columns["hit"]}, dataset)
    assert alone["hit"].tobytes() == once["hit"].tobytes()
    assert _generate(Rows(count=500), columns, dataset, seed=SEED + 1)["hit"].tobytes() != once["hit"].tobytes()


def test_a_location_beyond_the_numbers_range_is_refused_by_name():
    model = {"x": ColumnModel(model=Distribution(family="normal", mean=800, sd=1)),
             "y": ColumnModel(model=Distribution(family="lognormal", meanlog=0, sdlog=1), covariates={"x": 1.0})}
    with pytest.raises(PlanError, match="column 'y' gives values that are not finite"):
        _generate(Rows(count=10), model, _dataset(x="number", y="number"))


def test_effects_per_stratum_move_the_location_of_their_rows():
    rows = Rows(groups=GroupRows(column="arm", sizes={"a": 20_000, "b": 20_000}),
                strata=StrataRows(column="depot", shares={"north": 0.5, "south": 0.5}))
    dataset = Dataset(file="x.csv", columns={"arm": Column(type="category", levels=["a", "b"]),
                                             "depot": Column(type="category", levels=["north", "south"]),
                                             "y": Column(type="number")})
    model = {"y": ColumnModel(model=Distribution(family="normal", mean=10, sd=2), by_group={"b": {"mean": 11}},
                              covariates={"depot": {"south": -3.0}})}
    out = _generate(rows, model, dataset)
    for arm, mean in (("a", 10.0), ("b", 11.0)):
        for depot, shift in (("north", 0.0), ("south", -3.0)):
            cell = out["y"][(out["arm"] == arm) & (out["depot"] == depot)]
            assert abs(cell.mean() - (mean + shift)) < 4 * 2 / np.sqrt(cell.size)  # V-TOL


def _one_way_anova_icc(totals: np.ndarray, trials: np.ndarray) -> float:
    """The ANOVA estimator of the intraclass correlation of binary data from each cluster's successes
    and trials (Ridout, Demétrio & Firth 1999, Biometrics 55, 137–148, the estimator ρ_A; from memory):
    (MSB − MSW)/(MSB + (n_A − 1)·MSW)."""
    clusters, total = totals.size, trials.sum()
    between = (np.sum(totals**2 / trials) - totals.sum() ** 2 / total) / (clusters - 1)
    within = (totals.sum() - np.sum(totals**2 / trials)) / (total - clusters)
    n_a = (total - np.sum(trials**2) / total) / (clusters - 1)
    return float((between - within) / (between + (n_a - 1) * within))


def _batched_sd(values: np.ndarray, estimate) -> float:
    """The Monte Carlo sd of `estimate` over all clusters, from 20 batches of clusters."""
    return float(np.std([estimate(b) for b in np.array_split(values, 20)], ddof=1) / np.sqrt(20))


def test_clustered_gamma_keeps_each_rows_law_and_correlates_icc():
    """A shared Gamma(icc·shape) part plus the row's own Gamma((1 − icc)·shape) part, times the scale:
    each row Gamma(shape, scale) (scipy.stats.gamma, Kolmogorov–Smirnov on one row per cluster) and two
    rows of one cluster correlate icc·shape/shape = icc (Cherian 1941's bivariate gamma, from memory)."""
    icc = 0.35
    values = _clustered("gamma", {"shape": 2.0, "scale": 3.0}, "number", icc, clusters=20_000)
    assert stats.kstest(values[:, 0], stats.gamma(2.0, scale=3.0).cdf).pvalue > 1e-3  # scipy reference
    sd = _batched_sd(values, _within_pair_correlation)
    assert abs(_within_pair_correlation(values) - icc) < 4 * sd + 1e-3  # V-TOL


def test_clustered_binomial_rows_are_beta_binomial_with_the_stated_icc():
    """Each row is Binomial(size, P_c) with the cluster's P_c ~ Beta(a, b), mean p and 1/(a + b + 1) = icc:
    a row is scipy.stats.betabinom(size, a, b) (chi-square on one row per cluster; its mean is size·p),
    and the ANOVA estimator of the trials' intraclass correlation, from each cluster's successes out of
    2·size trials, estimates icc (Ridout, Demétrio & Firth 1999)."""
    size, p, icc = 5, 0.3, 0.2
    a, b = p * (1 - icc) / icc, (1 - p) * (1 - icc) / icc
    reference = stats.betabinom(size, a, b)
    assert 1 / (a + b + 1) == pytest.approx(icc) and reference.mean() == pytest.approx(size * p)  # identities
    values = _clustered("binomial", {"size": size, "p": p}, "integer", icc, clusters=20_000)
    _assert_distribution(values[:, 0], "binomial", reference)

    def anova(block: np.ndarray) -> float:
        return _one_way_anova_icc(block.sum(axis=1), np.full(block.shape[0], 2.0 * size))

    assert abs(anova(values) - icc) < 4 * _batched_sd(values, anova) + 1e-3  # V-TOL


def _frailty_pairs(family: str, parameters: dict, frailty: float, clusters: int = 4_000) -> np.ndarray:
    rows = Rows(count=2 * clusters, clusters=ClusterRows(column="site", count=clusters, frailty=frailty))
    out = _generate(rows, {"t": ColumnModel(model=Distribution(family=family, **parameters))},
                    _dataset(site="integer", t="number"))
    assert (out["site"][0::2] == out["site"][1::2]).all()
    return out["t"].reshape(clusters, 2)


def test_an_exponential_time_under_a_gamma_frailty_is_lomax_and_its_pairs_have_kendalls_tau():
    """T = mean·E/Z with Z ~ Gamma(1/θ, θ): one time per cluster is scipy.stats.lomax(c = 1/θ, scale = mean/θ)
    (an exponential mixed over a gamma rate), and two times of one cluster have Kendall's τ = θ/(θ + 2)
    (the gamma frailty's Clayton copula; Hougaard 2000, Analysis of Multivariate Survival Data, ch. 7;
    Clayton 1978, Biometrika 65, 141–151; from memory), scipy.stats.kendalltau on the pairs."""
    theta, mean = 0.8, 5.0
    times = _frailty_pairs("exponential", {"mean": mean}, theta)
    assert stats.kstest(times[:, 0], stats.lomax(1 / theta, scale=mean / theta).cdf).pvalue > 1e-3  # scipy
    tau = stats.kendalltau(times[:, 0], times[:, 1]).statistic
    # V-TOL: 4 Monte Carlo sd of τ̂ from 20 batches of clusters
    sd = _batched_sd(times, lambda b: stats.kendalltau(b[:, 0], b[:, 1]).statistic)
    assert abs(tau - theta / (theta + 2)) < 4 * sd


def test_a_weibull_time_under_a_gamma_frailty_has_the_closed_form_marginal_mean_and_median():
    """The marginal survival (1 + θ(t/scale)^shape)^(−1/θ) (truth.py's Burr XII law) against the sample:
    its mean and median within Monte Carlo error, and Kendall's τ of two times of one cluster θ/(θ + 2),
    whatever the margins (the copula is the frailty's)."""
    from planrunner.simulate.truth import family_mean, family_median

    theta, parameters = 0.5, {"shape": 1.5, "scale": 2.0}
    times = _frailty_pairs("weibull", parameters, theta, clusters=20_000)
    first = times[:, 0]  # one time per cluster: independent
    mean, median = family_mean("weibull", {**parameters, "frailty": theta}), family_median(
        "weibull", {**parameters, "frailty": theta})
    assert abs(first.mean() - mean) < 4 * first.std() / np.sqrt(first.size)  # V-TOL
    # the sample median's sd: sqrt(1/4n)/f(m), f the Burr XII density at the median (V-TOL)
    density = stats.burr12(1.5, 1 / theta, scale=2.0 * theta ** (-1 / 1.5)).pdf(median)
    assert abs(np.median(first) - median) < 4 * np.sqrt(0.25 / first.size) / density
    assert stats.burr12(1.5, 1 / theta, scale=2.0 * theta ** (-1 / 1.5)).median() == pytest.approx(median)
    tau = stats.kendalltau(times[:4000, 0], times[:4000, 1]).statistic
    assert abs(tau - theta / (theta + 2)) < 4 * _batched_sd(times[:4000], lambda b: stats.kendalltau(
        b[:, 0], b[:, 1]).statistic)


def test_clusters_nest_in_strata_and_groups():
    """The strata shares apply to each group's clusters (largest remainder: 5 clusters × 0.5, 0.3, 0.2 are
    quotas 2.5, 1.5, 1.0, floors 2, 1, 1, the one left over to the earlier of the tied fractions: 3, 1, 1);
    each cluster lies in one stratum and one group, and its rows take its stratum."""
    rows = Rows(groups=GroupRows(column="arm", sizes={"a": 23, "b": 20}),
                strata=StrataRows(column="depot", shares={"north": 0.5, "east": 0.3, "west": 0.2}),
                clusters=ClusterRows(column="site", count=5, icc=0.2))
    dataset = Dataset(file="x.csv", columns={"arm": Column(type="category", levels=["a", "b"]),
                                             "depot": Column(type="category", levels=["north", "east", "west"]),
                                             "site": Column(type="integer"), "y": Column(type="number")})
    out = _generate(rows, {"y": ColumnModel(model=Distribution(family="gamma", shape=2.0, scale=1.0))}, dataset)
    for site in np.unique(out["site"]):
        rows_of = out["site"] == site
        assert len(set(out["depot"][rows_of])) == 1 and len(set(out["arm"][rows_of])) == 1
    for arm in ("a", "b"):
        in_arm = out["arm"] == arm
        per_stratum = {d: len(set(out["site"][in_arm & (out["depot"] == d)])) for d in ("north", "east", "west")}
        assert per_stratum == {"north": 3, "east": 1, "west": 1}  # largest remainder of 2.5, 1.5, 1.0
    assert out["depot"][:5].tolist() == ["north"] * 5 and out["site"][:5].tolist() == [1] * 5
