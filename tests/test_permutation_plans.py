"""Permutation and randomization tests end to end: plan file → CSV → record, against outside values.

Check values from docs/VALIDATION.md (the case id is named beside each value), exact identities
(docs/VALIDATION.md) and scipy/statsmodels reference functions.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from conftest import fixed_clock
from scipy import stats

from planrunner.pipeline.run import run_plan

# Source: E&T Table 2.1 (V-MOUSE-BOOT / V-MOUSE-PERM, published, confirmed)
TREATMENT = [94, 197, 16, 38, 99, 141, 23]
CONTROL = [52, 104, 146, 10, 51, 30, 40, 27, 46]
# Source: V-DARWIN (Fisher 1935 §21; cross − self, eighths of an inch)
DARWIN = [49, -67, 8, 16, 6, 23, 28, 41, 14, 29, 56, 24, 75, 60, -48]
# Source: V-DEPRESSION (H&W 1973 p. 29f)
HW_X = [1.83, 0.50, 1.62, 2.48, 1.68, 1.88, 1.55, 3.06, 1.30]
HW_Y = [0.878, 0.647, 0.598, 2.05, 1.06, 1.29, 1.06, 3.14, 1.29]
# Source: V-SLEEP (Student 1908)
DRUG1 = [0.7, -1.6, -0.2, -1.2, -0.1, 3.4, 3.7, 0.8, 0.0, 2.0]
DRUG2 = [1.9, 0.8, 1.1, 0.1, -0.1, 4.4, 5.5, 1.6, 4.6, 3.4]
# Source: V-PERMEABILITY (H&W 1973 p. 69f)
PERM_X = [0.80, 0.83, 1.89, 1.04, 1.45, 1.38, 1.91, 1.64, 0.73, 1.46]
PERM_Y = [1.15, 0.88, 0.90, 0.74, 1.21]
# Source: V-MWU (scipy mannwhitneyu docstring)
MALES = [19, 22, 16, 29, 24]
FEMALES = [20, 11, 17, 12]
# Source: V-PLANT (Dobson 1983, published, confirmed)
PLANT = {
    "ctrl": [4.17, 5.58, 5.18, 6.11, 4.50, 4.61, 5.17, 4.53, 5.33, 5.14],
    "trt1": [4.81, 4.17, 4.41, 3.59, 5.87, 3.83, 6.03, 4.89, 4.32, 4.69],
    "trt2": [6.31, 5.12, 5.54, 5.50, 5.37, 5.29, 4.92, 6.15, 5.80, 5.26],
}
# Source: V-LAW-JACK (E&T Table 3.1, the first 7 schools: LSAT, GPA)
LAW7 = [(576, 3.39), (635, 3.30), (558, 2.81), (578, 3.03), (666, 3.44), (580, 3.07), (555, 3.00)]

HEADER = """
plan: permutation-outside
title: Permutation tests against outside values
seed: {seed}
datasets:
  d:
    file: data.csv
    columns:
{columns}
analyses:
{analyses}
"""


def run(write_plan, tmp_path, columns: str, csv: str, analyses: str, extra: str = "", seed: int = 4242):
    plan = write_plan(HEADER.format(seed=seed, columns=columns, analyses=analyses) + extra, {"data.csv": csv})
    record = run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record
    return {a["id"]: a for a in record["analyses"]}, record


def groups_csv(groups: dict[str, list[float]], column: str = "y") -> str:
    return "\n".join([f"g,{column}"] + [f"{g},{v}" for g, vs in groups.items() for v in vs]) + "\n"


def pairs_csv(first: list[float], second: list[float]) -> str:
    lines = ["pair,arm,y"]
    for i, (a, b) in enumerate(zip(first, second)):
        lines += [f"p{i:02d},a,{a}", f"p{i:02d},b,{b}"]
    return "\n".join(lines) + "\n"


def analysis(aid: str, statistic: str, *, more: str = "", groups: str = "[a, b]") -> str:
    return f"""
  - id: {aid}
    role: secondary
    data: d
    outcome: y
    groups: {{by: g, compare: {groups}}}
    statistic: {statistic}
    method: permutation
{more}"""


TWO_GROUPS = "      g: {type: category}\n      y: {type: number}"
PAIRED = ("      pair: {type: text}\n      arm: {type: category, levels: [a, b]}\n      y: {type: number}")


def paired(aid: str, statistic: str, more: str = "") -> str:
    return f"""
  - id: {aid}
    role: secondary
    data: d
    outcome: y
    groups: {{by: arm, compare: [a, b]}}
    pairs: pair
    statistic: {statistic}
    method: permutation
{more}"""


# ------------------------------------------------------------------ identity 15, V-MOUSE-PERM

def test_equivalent_statistics_give_identical_exact_p_values(write_plan, tmp_path):
    """Identity 15: Δmean and the pooled t give the same exact p; Welch's t need not."""
    body = "".join(analysis(f"{s}-{alt}", s, more=f"    alternative: {alt}\n    resamples: 20000\n")
                   for s in ("mean_difference", "t_pooled", "t_welch") for alt in ("greater", "two-sided"))
    result, _ = run(write_plan, tmp_path, TWO_GROUPS, groups_csv({"a": TREATMENT, "b": CONTROL}), body)
    for alt in ("greater", "two-sided"):
        assert result[f"mean_difference-{alt}"]["p_value"] == result[f"t_pooled-{alt}"]["p_value"]  # identity 15
    assert result["mean_difference-greater"]["details"]["count_greater_equal"] == 1613  # Source: V-MOUSE-PERM, exact
    assert result["t_pooled-greater"]["p_value"] == 1613 / 11440  # Source: V-MOUSE-PERM, exact
    # Source: V-MOUSE-PERM: Student pooled t = 1.1208454, Welch t = 1.0587
    assert result["t_pooled-greater"]["estimate"] == pytest.approx(1.1208454, abs=1e-7)
    assert result["t_welch-greater"]["estimate"] == pytest.approx(1.0587, abs=1e-4)
    # Welch's t is not a monotone function of Δmean over the arrangements: its exact p is its own
    welch = stats.permutation_test(
        (TREATMENT, CONTROL), lambda x, y, axis=-1: stats.ttest_ind(x, y, equal_var=False, axis=axis).statistic,
        n_resamples=np.inf, alternative="greater", vectorized=True)  # scipy reference
    assert result["t_welch-greater"]["p_value"] == pytest.approx(welch.pvalue, rel=1e-12)
    assert result["t_welch-greater"]["p_value"] != result["t_pooled-greater"]["p_value"]


def test_pooled_t_exact_by_dynamic_programming_equals_enumeration(write_plan, tmp_path):
    """Integer data, resamples < arrangements: the DP null replaces enumeration with the same p."""
    body = (analysis("dp", "t_pooled", more="    alternative: greater\n    resamples: 1000\n")
            + analysis("dp2", "mean_difference", more="    resamples: 1000\n    two_sided: absolute\n"))
    result, _ = run(write_plan, tmp_path, TWO_GROUPS, groups_csv({"a": TREATMENT, "b": CONTROL}), body)
    assert result["dp"]["details"]["computation"] == "dynamic programming" and result["dp"]["exact"]
    assert result["dp"]["p_value"] == pytest.approx(1613 / 11440, rel=1e-13)  # Source: V-MOUSE-PERM, exact
    # Source: V-MOUSE-PERM: |Δ| rule 3184/11440
    assert result["dp2"]["p_value"] == pytest.approx(3184 / 11440, rel=1e-13)
    assert result["dp2"]["details"]["two_sided_rule"] == "absolute"
    assert result["dp"]["distribution"]["weighted"] and result["dp"]["distribution"]["size"] == 11440


# ------------------------------------------------------------------ paired: V-DARWIN, V-DEPRESSION, V-SLEEP

def test_darwin_sign_flip_and_signed_rank(write_plan, tmp_path):
    # only the differences are published: each pair is written as (difference, 0)
    csv = pairs_csv(DARWIN, [0] * len(DARWIN))
    body = (paired("flip2", "mean_difference", "    resamples: 40000\n")
            + paired("flip1", "mean_difference", "    resamples: 40000\n    alternative: greater\n")
            + paired("flipabs", "mean_difference", "    resamples: 40000\n    two_sided: absolute\n")
            + paired("rank", "signed_rank", "    resamples: 40000\n")
            + paired("rank-dp", "signed_rank", "    resamples: 999\n    alternative: greater\n"))
    result, _ = run(write_plan, tmp_path, PAIRED, csv, body)
    assert result["flip2"]["scheme"].startswith("sign-flip within pairs")
    assert result["flip2"]["details"]["arrangements"] == 2 ** 15  # identity 18
    assert result["flip2"]["p_value"] == 1726 / 32768  # Source: V-DARWIN, exact (Fisher 1935)
    assert result["flip1"]["p_value"] == 863 / 32768  # Source: V-DARWIN, exact
    assert result["flipabs"]["p_value"] == 1726 / 32768  # identity 14: symmetric null, the rules coincide
    # Source: V-DARWIN (scipy wilcoxon docstring): T = 24, p = 0.041259765625
    assert result["rank"]["p_value"] == 0.041259765625
    assert result["rank"]["p_value"] == pytest.approx(stats.wilcoxon(DARWIN, method="exact").pvalue, rel=1e-12)
    assert result["rank-dp"]["estimate"] == 96  # Source: V-CONV-WILCOXON, T+ = 96
    assert result["rank-dp"]["details"]["computation"] == "dynamic programming"
    assert result["rank-dp"]["p_value"] == pytest.approx(0.0206298828125, rel=1e-13)  # Source: scipy docstring


def test_hw_depression_signed_rank_and_sign_flip(write_plan, tmp_path):
    body = (paired("v-greater", "signed_rank", "    alternative: greater\n")
            + paired("v-two", "signed_rank")
            + paired("mean-greater", "mean_difference", "    alternative: greater\n")
            + paired("mean-two", "mean_difference"))
    result, _ = run(write_plan, tmp_path, PAIRED, pairs_csv(HW_X, HW_Y), body)
    assert result["v-greater"]["estimate"] == 40  # Source: V-DEPRESSION (published, confirmed): V = 40
    assert result["v-greater"]["p_value"] == 10 / 512  # Source: V-DEPRESSION, exact (.01953)
    assert result["v-two"]["p_value"] == 20 / 512  # Source: V-DEPRESSION, exact (.03906)
    assert result["mean-greater"]["p_value"] == 7 / 512  # Source: V-DEPRESSION, exact
    assert result["mean-two"]["p_value"] == 14 / 512  # Source: V-DEPRESSION, exact
    ref = stats.wilcoxon(HW_X, HW_Y, alternative="greater", method="exact")  # scipy reference
    assert result["v-greater"]["p_value"] == pytest.approx(ref.pvalue, rel=1e-12)


def test_sleep_exact_sign_flip_counts_duplicates(write_plan, tmp_path):
    result, _ = run(write_plan, tmp_path, PAIRED, pairs_csv(DRUG1, DRUG2), paired("sleep", "mean_difference"))
    assert result["sleep"]["details"]["arrangements"] == 1024  # all 2^10 patterns, the zero included
    assert result["sleep"]["p_value"] == 4 / 1024  # Source: V-SLEEP, exact
    ref = stats.permutation_test((DRUG1, DRUG2), lambda x, y, axis=-1: np.mean(x - y, axis=axis),
                                 permutation_type="samples", n_resamples=np.inf)  # scipy reference
    assert result["sleep"]["p_value"] == pytest.approx(ref.pvalue, rel=1e-12)


def test_incomplete_pair_is_refused(write_plan, tmp_path):
    from planrunner.errors import DataError
    csv = pairs_csv(HW_X, HW_Y) + "p99,a,1.0\n"
    with pytest.raises(DataError, match="has no row in group"):
        run(write_plan, tmp_path, PAIRED, csv, paired("x", "mean_difference"))


# ------------------------------------------------------------------ rank sums: V-PERMEABILITY, V-MWU

def test_permeability_rank_sum_and_two_sided_rules(write_plan, tmp_path):
    body = (analysis("w", "rank_sum", more="    alternative: greater\n")
            + analysis("dmean", "mean_difference", more="    alternative: greater\n")
            + analysis("dmean-abs", "mean_difference", more="    two_sided: absolute\n"))
    result, _ = run(write_plan, tmp_path, TWO_GROUPS, groups_csv({"a": PERM_X, "b": PERM_Y}), body)
    assert result["w"]["p_value"] == 382 / 3003  # Source: V-PERMEABILITY, exact (.1272, published)
    mwu = stats.mannwhitneyu(PERM_X, PERM_Y, alternative="greater", method="exact")  # scipy reference
    assert result["w"]["p_value"] == pytest.approx(mwu.pvalue, rel=1e-12)  # identity 15
    assert result["w"]["estimate"] == pytest.approx(mwu.statistic + 10 * 11 / 2)  # W = U + n1(n1+1)/2
    assert result["dmean"]["p_value"] == 191 / 3003  # Source: V-PERMEABILITY, exact
    assert result["dmean-abs"]["p_value"] == 396 / 3003  # Source: V-PERMEABILITY, exact (|Δ|)
    assert result["dmean-abs"]["details"]["count_absolute"] == 396


def test_mwu_docstring_example(write_plan, tmp_path):
    result, _ = run(write_plan, tmp_path, TWO_GROUPS, groups_csv({"a": MALES, "b": FEMALES}),
                    analysis("u", "rank_sum"))
    assert result["u"]["p_value"] == pytest.approx(1 / 9, rel=1e-12)  # Source: V-MWU, exact 1/9
    assert result["u"]["estimate"] - 15 == 17  # Source: V-MWU: U = 17 (W − n1(n1+1)/2)


# ------------------------------------------------------------------ k groups: V-PLANT, V-FLOOR

def test_plant_growth_f_and_h_monte_carlo(write_plan, tmp_path):
    m = 4000
    body = (analysis("f", "one_way_f", groups="[ctrl, trt1, trt2]", more=f"    resamples: {m}\n")
            + analysis("h", "rank_h", groups="[ctrl, trt1, trt2]", more=f"    resamples: {m}\n"))
    result, _ = run(write_plan, tmp_path, TWO_GROUPS, groups_csv(PLANT), body)
    f, h = result["f"], result["h"]
    assert f["estimate"] == pytest.approx(4.8460879, abs=1e-6)  # Source: V-PLANT (scipy 4.8460879)
    # no tie correction (the tie handling stated): equals scipy's H times its tie-correction factor
    pooled = np.concatenate(list(PLANT.values()))
    correction = stats.tiecorrect(stats.rankdata(pooled))
    assert h["estimate"] == pytest.approx(7.9882287 * correction, rel=1e-7)  # Source: V-PLANT
    assert f["alternative"] == "greater" and not f["exact"]
    for entry, p in ((f, 0.016630), (h, 0.014305)):  # Source: V-PLANT (MC, m = 2e5)
        assert abs(entry["p_value"] - p) <= 4 * math.sqrt(p * (1 - p) / m)  # V-TOL tolerance
        assert entry["p_value"] >= 1 / (m + 1)
    assert "ctrl, trt1, trt2 by g" in f["question"]


def test_k_group_exact_matches_scipy(write_plan, tmp_path):
    groups = {"a": [3.1, 4.7, 2.2], "b": [5.5, 6.1], "c": [1.0, 2.5, 0.4]}
    result, _ = run(write_plan, tmp_path, TWO_GROUPS, groups_csv(groups),
                    analysis("f", "one_way_f", groups="[a, b, c]", more="    resamples: 1000\n"))
    assert result["f"]["exact"] and result["f"]["details"]["arrangements"] == 560  # identity 18: 8!/(3!2!3!)
    ref = stats.permutation_test(list(groups.values()), lambda *g: stats.f_oneway(*g).statistic,
                                 n_resamples=np.inf, alternative="greater")  # scipy reference
    assert result["f"]["p_value"] == pytest.approx(ref.pvalue, rel=1e-12)


def test_iris_monte_carlo_floor(write_plan, tmp_path):
    from sklearn.datasets import load_iris
    iris = load_iris()
    names = iris.target_names[iris.target]
    csv = "g,y\n" + "".join(f"{g},{v}\n" for g, v in zip(names, iris.data[:, 0]))
    result, _ = run(write_plan, tmp_path, TWO_GROUPS, csv,
                    analysis("iris", "one_way_f", groups="[setosa, versicolor, virginica]",
                             more="    resamples: 999\n"))
    assert result["iris"]["estimate"] == pytest.approx(119.2645, abs=1e-4)  # Source: V-FLOOR
    assert result["iris"]["details"]["count_greater_equal"] == 0
    assert result["iris"]["p_value"] == 1 / 1000  # Source: V-FLOOR, exact: (0 + 1)/(999 + 1)


# ------------------------------------------------------------------ binary: V-TEA, V-TWINS, V-FISHER-DOC

def binary_csv(table: list[list[int]]) -> str:
    """Rows of a 2×2 table as groups a and b; column 1 is outcome true."""
    lines = ["g,y"]
    for g, (yes, no) in zip("ab", table):
        lines += [f"{g},true"] * yes + [f"{g},false"] * no
    return "\n".join(lines) + "\n"


BINARY = "      g: {type: category}\n      y: {type: boolean}"


@pytest.mark.parametrize("table, alternative, expected", [
    ([[3, 1], [1, 3]], "greater", 17 / 70),  # Source: V-TEA, exact 17/70
    ([[2, 10], [15, 3]], "less", 0.000465180943),  # Source: V-TWINS, exact
    ([[8, 2], [1, 5]], "greater", None),  # V-FISHER-DOC table; scipy reference only
])
def test_difference_in_proportions_equals_fisher(write_plan, tmp_path, table, alternative, expected):
    result, _ = run(write_plan, tmp_path, BINARY, binary_csv(table),
                    analysis("rd", "risk_difference", more=f"    alternative: {alternative}\n    resamples: 50\n"))
    entry = result["rd"]
    fisher = stats.fisher_exact(table, alternative=alternative).pvalue  # scipy reference; identity 17
    assert entry["exact"]
    assert entry["p_value"] == pytest.approx(fisher, rel=1e-10)
    if expected is not None:
        assert entry["p_value"] == pytest.approx(expected, rel=1e-9)
    if table == [[2, 10], [15, 3]]:
        assert entry["details"]["computation"] == "dynamic programming"  # C(30, 12) arrangements


@pytest.mark.parametrize("table, alternative", [([[3, 1], [1, 3]], "greater"), ([[2, 10], [15, 3]], "less")])
def test_ratio_of_proportions_equals_fisher_one_sided(write_plan, tmp_path, table, alternative):
    """The ratio increases with the first group's count, like the difference: the same exact p."""
    body = (analysis("rr", "risk_ratio", more=f"    alternative: {alternative}\n    resamples: 50\n")
            + analysis("rr-mc", "risk_ratio", more=f"    alternative: {alternative}\n    exact: never\n"
                                                   "    resamples: 400\n"))
    result, _ = run(write_plan, tmp_path, BINARY, binary_csv(table), body)
    fisher = stats.fisher_exact(table, alternative=alternative).pvalue  # scipy reference (identity 17)
    assert result["rr"]["exact"] and result["rr"]["p_value"] == pytest.approx(fisher, rel=1e-10)
    (yes1, no1), (yes2, no2) = table
    assert result["rr"]["estimate"] == pytest.approx((yes1 / (yes1 + no1)) / (yes2 / (yes2 + no2)))
    assert 0 < result["rr-mc"]["p_value"] <= 1
    if table == [[3, 1], [1, 3]]:  # the split with all four 1s in the first group gives +inf
        assert result["rr"]["distribution"]["infinite"] == 1 and result["rr"]["distribution"]["size"] == 70


def test_fisher_two_sided_convention_differs_and_is_stated(write_plan, tmp_path):
    """V-CONV-FISHER: Fisher's two-sided sums tables no more probable; ours doubles the smaller tail."""
    result, _ = run(write_plan, tmp_path, BINARY, binary_csv([[8, 2], [1, 5]]), analysis("rd", "risk_difference"))
    greater = stats.fisher_exact([[8, 2], [1, 5]], alternative="greater").pvalue  # scipy reference
    assert result["rd"]["p_value"] == pytest.approx(2 * greater, rel=1e-12)
    # Source: V-FISHER-DOC: Fisher two-sided 0.034965034965 (a different convention)
    assert result["rd"]["p_value"] != pytest.approx(0.034965034965, rel=1e-6)
    assert result["rd"]["details"]["two_sided_rule"] == "doubled"


# ------------------------------------------------------------------ association and Freedman–Lane

LAW_COLUMNS = "      x: {type: number}\n      y: {type: number}\n      z: {type: number}"


def law_csv(rows=LAW7, z=None) -> str:
    z = z or [0.0] * len(rows)
    return "x,y,z\n" + "".join(f"{a},{b},{c}\n" for (a, b), c in zip(rows, z))


def association(aid: str, statistic: str, more: str = "") -> str:
    return f"""
  - id: {aid}
    role: secondary
    data: d
    outcome: y
    predictor: x
    statistic: {statistic}
    method: permutation
{more}"""


def test_association_exact_matches_scipy_pairings(write_plan, tmp_path):
    body = "".join(association(s, s) for s in ("correlation", "slope", "spearman", "kendall"))
    result, _ = run(write_plan, tmp_path, LAW_COLUMNS, law_csv(), body)
    x, y = np.array(LAW7).T
    ranks_x = stats.rankdata(x)
    refs = {"correlation": lambda y_, axis=-1: stats.pearsonr(x, y_, axis=axis).statistic,
            "spearman": lambda y_, axis=-1: stats.pearsonr(ranks_x, stats.rankdata(y_, axis=axis), axis=axis).statistic}
    for name, ref_stat in refs.items():
        entry = result[name]
        assert entry["exact"] and entry["details"]["arrangements"] == 5040  # identity 18: 7!
        ref = stats.permutation_test((y,), ref_stat, permutation_type="pairings", n_resamples=np.inf,
                                     vectorized=True)  # scipy reference
        assert entry["p_value"] == pytest.approx(ref.pvalue, rel=1e-12), name
    assert result["spearman"]["estimate"] == pytest.approx(stats.spearmanr(x, y).statistic, rel=1e-12)  # scipy
    assert result["slope"]["estimate"] == pytest.approx(stats.linregress(x, y).slope, rel=1e-12)  # scipy
    # no ties: the exact null of tau is scipy's exact Kendall test (scipy reference)
    tau = stats.kendalltau(x, y, method="exact")
    assert result["kendall"]["estimate"] == pytest.approx(tau.statistic, rel=1e-12)
    assert result["kendall"]["p_value"] == pytest.approx(tau.pvalue, rel=1e-12)
    assert result["correlation"]["p_value"] == result["slope"]["p_value"]  # identity 15
    assert result["correlation"]["scheme"] == "outcome shuffled against the predictor"


def test_freedman_lane_by_definition(write_plan, tmp_path):
    z = [2.0, 1.0, 4.0, 3.0, 7.0, 5.0, 6.0]  # invented covariate
    body = association("fl", "slope", "    covariates: [z]\n    alternative: greater\n")
    result, _ = run(write_plan, tmp_path, LAW_COLUMNS, law_csv(z=z), body)
    entry = result["fl"]
    assert entry["scheme"].startswith("Freedman–Lane") and entry["exact"]
    # the plain computation, from Freedman & Lane (1983): y* = ŷ(z) + permuted residuals, full OLS refit
    import itertools
    x, y = np.array(LAW7).T
    zc = np.column_stack([np.ones(7), z])
    fitted = zc @ np.linalg.lstsq(zc, y, rcond=None)[0]
    resid = y - fitted
    full = np.column_stack([np.ones(7), x, z])
    observed = np.linalg.lstsq(full, y, rcond=None)[0][1]
    null = np.array([np.linalg.lstsq(full, fitted + resid[list(p)], rcond=None)[0][1]
                     for p in itertools.permutations(range(7))])
    assert entry["estimate"] == pytest.approx(observed, rel=1e-10)
    tol = 2.0 ** -43 * max(abs(observed), np.abs(null).max())  # the documented tie rule
    assert entry["details"]["count_greater_equal"] == int(np.sum(null >= observed - tol))


# ------------------------------------------------------------------ clusters

CLUSTER_COLUMNS = "      g: {type: category}\n      ward: {type: text}\n      y: {type: number}"


def cluster_csv(wards: dict[str, tuple[str, list[float]]]) -> str:
    return "g,ward,y\n" + "".join(f"{g},{w},{v}\n" for w, (g, vs) in wards.items() for v in vs)


WARDS = {  # invented cluster-randomized data: 8 wards, 4 per arm, unequal sizes
    "w1": ("a", [5.1, 6.0, 5.5]), "w2": ("a", [7.2, 6.8]), "w3": ("a", [6.1, 5.9, 6.4, 6.6]), "w4": ("a", [8.0]),
    "w5": ("b", [4.2, 5.0]), "w6": ("b", [5.3, 4.8, 5.1]), "w7": ("b", [6.0, 5.2]), "w8": ("b", [4.4, 4.9, 4.0]),
}


def test_cluster_shuffle_by_definition_and_few_clusters_warning(write_plan, tmp_path):
    body = "".join(f"""
  - id: {aid}
    role: secondary
    data: d
    outcome: y
    groups: {{by: g, compare: [a, b]}}
    clusters: ward
    statistic: {s}
    method: permutation
    alternative: greater
""" for aid, s in (("mean", "mean_difference"), ("median", "median_difference")))
    body += """
  - id: two-sided
    role: secondary
    data: d
    outcome: y
    groups: {by: g, compare: [a, b]}
    clusters: ward
    statistic: mean_difference
    method: permutation
"""
    result, _ = run(write_plan, tmp_path, CLUSTER_COLUMNS, cluster_csv(WARDS), body)
    import itertools
    wards = list(WARDS.values())
    for aid, stat in (("mean", np.mean), ("median", np.median)):
        null = []
        for chosen in itertools.combinations(range(8), 4):  # identity 18: C(8, 4) = 70 cluster arrangements
            first = np.concatenate([wards[i][1] for i in chosen])
            second = np.concatenate([wards[i][1] for i in range(8) if i not in chosen])
            null.append(stat(first) - stat(second))
        null = np.array(null)
        obs = result[aid]["estimate"]
        assert result[aid]["details"]["arrangements"] == 70
        assert result[aid]["details"]["count_greater_equal"] == int(np.sum(null >= obs - 1e-9))
        assert result[aid]["scheme"].startswith("cluster labels shuffled")
    # two-sided with 70 arrangements: smallest p = 2/70 < 0.05; one-sided 1/70: no warning either
    assert not [w for w in result["two-sided"]["warnings"] if w["code"] == "few-clusters"]


def test_too_few_clusters_warns(write_plan, tmp_path):
    few = {k: WARDS[k] for k in ("w1", "w2", "w3", "w5", "w6", "w7")}  # C(6, 3) = 20: smallest two-sided p 0.1
    body = """
  - id: few
    role: secondary
    data: d
    outcome: y
    groups: {by: g, compare: [a, b]}
    clusters: ward
    statistic: mean_difference
    method: permutation
"""
    result, _ = run(write_plan, tmp_path, CLUSTER_COLUMNS, cluster_csv(few), body)
    codes = [w["code"] for w in result["few"]["warnings"]]
    assert "few-clusters" in codes and "p-floor-above-alpha" in codes
    assert result["few"]["details"]["smallest_p"] == pytest.approx(2 / 20)  # identity 13, doubled


def test_cluster_split_across_groups_is_refused(write_plan, tmp_path):
    from planrunner.errors import DataError
    bad = dict(WARDS)
    bad["w9"] = ("a", [1.0])
    csv = cluster_csv(bad) + "b,w9,2.0\n"
    # the data check before any resampling names the cluster, both groups and the lines
    with pytest.raises(DataError, match=r"cluster 'w9' \(column 'ward'\) has rows in group 'a'"):
        run(write_plan, tmp_path, CLUSTER_COLUMNS, csv, """
  - id: x
    role: secondary
    data: d
    outcome: y
    groups: {by: g, compare: [a, b]}
    clusters: ward
    statistic: mean_difference
    method: permutation
""")


# ------------------------------------------------------------------ exactness, MC interval, floors

def test_exact_always_infeasible_names_the_count(write_plan, tmp_path):
    from planrunner.errors import EngineError
    x = [0.1 * i + 0.05 for i in range(15)]
    y = [0.1 * i + 0.07 for i in range(15)]
    with pytest.raises(EngineError, match="155,117,520 arrangements"):  # identity 18: C(30, 15)
        run(write_plan, tmp_path, TWO_GROUPS, groups_csv({"a": x, "b": y}),
            analysis("x", "median_difference", more="    exact: always\n"))


def test_monte_carlo_interval_and_alpha_warning(write_plan, tmp_path):
    # V-PERMEABILITY Δmean, greater: exact p = 191/3003 = 0.0636, close to alpha = 0.05
    body = "".join(analysis(f"mc{m}", "mean_difference", more=f"    alternative: greater\n    exact: never\n"
                                                             f"    resamples: {m}\n") for m in (100, 500))
    result, _ = run(write_plan, tmp_path, TWO_GROUPS, groups_csv({"a": PERM_X, "b": PERM_Y}), body)
    for m in (100, 500):
        entry = result[f"mc{m}"]
        b = entry["details"]["count_greater_equal"]
        interval = entry["monte_carlo"]["p_value_interval"]
        ref = stats.binomtest(b, m).proportion_ci(confidence_level=0.99, method="exact")  # scipy reference
        assert (interval["lower"], interval["upper"]) == pytest.approx((ref.low, ref.high), rel=1e-9)
        assert entry["monte_carlo"]["p_value_sd"] == pytest.approx(
            math.sqrt(entry["p_value"] * (1 - entry["p_value"]) / m))
        inside = interval["lower"] <= 0.05 <= interval["upper"]
        assert inside == ("mc-interval-contains-alpha" in [w["code"] for w in entry["warnings"]])
    assert result["mc100"]["monte_carlo"]["p_value_interval"]["lower"] < 0.05  # 100 draws cannot settle it
    assert "mc-interval-contains-alpha" in [w["code"] for w in result["mc100"]["warnings"]]


def test_smallest_p_after_multiplicity_warns(write_plan, tmp_path):
    # MWU example: 126 arrangements, smallest one-sided p = 1/126; Bonferroni over 8 makes it 0.063 > 0.05
    ids = [f"t{i}" for i in range(8)]
    body = "".join(analysis(i, "rank_sum", more="    alternative: greater\n") for i in ids)
    extra = f"multiplicity:\n  - family: [{', '.join(ids)}]\n    method: bonferroni\n"
    result, record = run(write_plan, tmp_path, TWO_GROUPS, groups_csv({"a": MALES, "b": FEMALES}), body, extra)
    assert result["t0"]["details"]["smallest_p"] == pytest.approx(1 / 126)  # identity 13: C(9, 4) = 126
    codes = [w["code"] for w in result["t0"]["warnings"]]
    assert "adjusted-p-floor-above-alpha" in codes and "p-floor-above-alpha" not in codes
    assert record["multiplicity"][0]["unadjusted"]["t0"] == result["t0"]["p_value"]


# ------------------------------------------------------------------ interval by inversion

def test_shift_interval_rank_sum_is_the_hodges_lehmann_interval(write_plan, tmp_path):
    body = analysis("hl", "rank_sum", more="    intervals: [shift]\n    confidence: 0.95\n")
    body += analysis("mean", "mean_difference", more="    intervals: [shift]\n")
    result, _ = run(write_plan, tmp_path, TWO_GROUPS, groups_csv({"a": PERM_X, "b": PERM_Y}), body)
    x, y = np.array(PERM_X), np.array(PERM_Y)
    walsh = np.sort(np.subtract.outer(x, y).ravel())
    # classical exact interval (Lehmann 1975 §2.6): [D_(k), D_(mn+1−k)] with k − 1 the largest u such
    # that P(U ≤ u) ≤ α/2; the null of U by direct enumeration of the C(15, 10) splits (identity 18)
    cum = np.cumsum(_u_null(10, 5))
    k = int(np.max(np.flatnonzero(cum <= 0.025))) + 1
    interval = result["hl"]["intervals"][0]
    assert interval["method"] == "shift" and interval["level"] == 0.95
    assert interval["lower"] == pytest.approx(walsh[k - 1], abs=1e-9)
    assert interval["upper"] == pytest.approx(walsh[walsh.size - k], abs=1e-9)
    assert result["hl"]["details"]["shift_estimate"] == pytest.approx(np.median(walsh))  # Hodges–Lehmann
    # the mean-shift interval: endpoints where scipy's permutation test of x − δ vs y starts to reject
    mean = result["mean"]
    assert mean["details"]["shift_estimate"] == pytest.approx(x.mean() - y.mean(), rel=1e-9)
    lo, hi = mean["intervals"][0]["lower"], mean["intervals"][0]["upper"]
    for delta, rejected in ((lo - 1e-6, True), (lo + 1e-6, False), (hi - 1e-6, False), (hi + 1e-6, True)):
        p = stats.permutation_test((x - delta, y), lambda a, b, axis=-1: a.mean(axis) - b.mean(axis),
                                   n_resamples=np.inf, vectorized=True).pvalue  # scipy reference
        assert (p <= 0.05) == rejected, (delta, p)


def _u_null(m: int, n: int) -> np.ndarray:
    """Exact null distribution of the Mann–Whitney U by enumeration (identity 18: C(m+n, m) splits)."""
    import itertools
    counts = np.zeros(m * n + 1)
    for chosen in itertools.combinations(range(m + n), m):
        rest = set(range(m + n)) - set(chosen)
        counts[sum(1 for a in chosen for b in rest if a > b)] += 1
    return counts / counts.sum()


# ------------------------------------------------------------------ max-T end to end

TWO_OUTCOMES = "      g: {type: category}\n      y: {type: number}\n      w: {type: number}"


def two_outcome_csv() -> str:
    # y: the mouse survival data (E&T Table 2.1); w: an invented second endpoint on the same animals
    w = [3.1, 5.2, 0.4, 1.9, 3.3, 4.8, 0.9, 2.0, 3.9, 4.1, 0.3, 1.7, 1.2, 1.6, 0.8, 1.5]
    rows = [("a", v) for v in TREATMENT] + [("b", v) for v in CONTROL]
    return "g,y,w\n" + "".join(f"{g},{v},{x}\n" for (g, v), x in zip(rows, w))


def endpoint(aid: str, outcome: str, statistic: str, alternative: str) -> str:
    return f"""
  - id: {aid}
    role: secondary
    data: d
    outcome: {outcome}
    groups: {{by: g, compare: [a, b]}}
    statistic: {statistic}
    method: permutation
    alternative: {alternative}
    resamples: 20000
"""


def test_max_t_family_end_to_end_and_order_free(write_plan, tmp_path):
    first = endpoint("days", "y", "mean_difference", "greater") + endpoint("score", "w", "t_welch", "two-sided")
    second = endpoint("extra", "w", "median_difference", "less") + endpoint("score", "w", "t_welch", "two-sided") \
        + endpoint("days", "y", "mean_difference", "greater")
    family = "multiplicity:\n  - family: [days, score]\n    method: max-t\n"
    a, record_a = run(write_plan, tmp_path / "one", TWO_OUTCOMES, two_outcome_csv(), first, family)
    b, record_b = run(write_plan, tmp_path / "two", TWO_OUTCOMES, two_outcome_csv(), second, family)
    fam_a, fam_b = record_a["multiplicity"][0], record_b["multiplicity"][0]
    assert fam_a["adjusted"] == fam_b["adjusted"]  # the family's stream and arrangements ignore plan order
    details = fam_a["details"]
    assert details["exact"] and details["arrangements"] == 11440  # all C(16, 7) splits, shared by both
    # the endpoint alone on the same (all) arrangements: mean difference greater is V-MOUSE-PERM's 1613/11440
    assert details["unadjusted_same_permutations"][0] == pytest.approx(1613 / 11440, rel=1e-12)
    for aid in ("days", "score"):
        assert fam_a["adjusted"][aid] >= fam_a["unadjusted"][aid] - 1e-12
        assert a[aid]["adjusted_p_values"] == [{"method": "max-t", "p_value": fam_a["adjusted"][aid]}]
    # the output folder also holds history.jsonl and index.html: take the run folder
    run_folder = next(p for p in (tmp_path / "one" / "out").iterdir() if p.is_dir())
    report = (run_folder / "report.md").read_text(encoding="utf-8")
    assert "unadjusted" in report and "max-t" in report


def test_demo_ward_hygiene_plan_runs(tmp_path):
    from pathlib import Path
    plan = Path(__file__).resolve().parent.parent / "plans" / "ward-hygiene" / "plan.yaml"
    record = run_plan(plan, out=tmp_path / "runs", clock=fixed_clock).record
    by_id = {a["id"]: a for a in record["analyses"]}
    assert by_id["primary"]["scheme"].startswith("cluster labels shuffled")
    assert by_id["primary"]["details"]["arrangements"] == math.comb(12, 6)  # identity 18 over wards
    assert by_id["within-ward-change"]["details"]["arrangements"] == 2 ** 6
    assert by_id["staffing"]["scheme"].startswith("Freedman–Lane")
    assert by_id["wear"]["intervals"][0]["method"] == "shift"
    assert record["multiplicity"][0]["details"]["exact"]  # 12870 splits ≤ 20000 resamples
    for a in record["analyses"]:
        assert 0 < a["p_value"] <= 1
