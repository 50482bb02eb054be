"""Bootstrap and jackknife designs end to end: plan file and CSV → record, checked against
docs/VALIDATION.md values (source beside each), exact identities and scipy.stats.bootstrap."""

from __future__ import annotations

import math

import numpy as np
import pytest
from conftest import fixed_clock
from scipy import stats

from planrunner.errors import EngineError
from planrunner.pipeline.run import run_plan

HEAD = """
plan: designs
title: Designs from a plan
seed: {seed}
datasets:
  d:
    file: d.csv
    columns:
{columns}
analyses:
{analyses}
"""

# Source: E&T Table 2.1 (V-MOUSE-BOOT, published, confirmed)
TREATMENT = [94, 197, 16, 38, 99, 141, 23]
# Source: E&T Table 3.1 (V-LAW-JACK / V-LAW-BOOT, published, confirmed; 2.76 for school 13)
LAW = [(576, 3.39), (635, 3.30), (558, 2.81), (578, 3.03), (666, 3.44), (580, 3.07), (555, 3.00), (661, 3.43),
       (651, 3.36), (605, 3.13), (653, 3.12), (575, 2.74), (545, 2.76), (572, 2.88), (594, 2.96)]
# Source: E&T Table 14.1 (V-SPATIAL, published, confirmed): test A, 26 children
SPATIAL_A = [48, 36, 20, 29, 42, 42, 20, 42, 22, 41, 45, 14, 6, 0, 33, 28, 34, 4, 32, 24, 47, 41, 24, 26, 30, 41]
# Source: E&T Table 10.1 (V-PATCH, published, confirmed)
PLACEBO = [9243, 9671, 11792, 13357, 9055, 6290, 12412, 18806]
OLD = [17649, 12013, 19979, 21816, 13850, 9806, 17208, 29044]
NEW = [16449, 14614, 17274, 23798, 12560, 10157, 16570, 26325]
# Source: V-DEPRESSION (H&W 1973 p. 29f, published, confirmed): x first visit, y second visit
HW_X = [1.83, 0.50, 1.62, 2.48, 1.68, 1.88, 1.55, 3.06, 1.30]
HW_Y = [0.878, 0.647, 0.598, 2.05, 1.06, 1.29, 1.06, 3.14, 1.29]

DAYS_CSV = "days\n" + "\n".join(map(str, TREATMENT)) + "\n"
VISIT_COLS = ("      patient: {type: text, identifier: true}\n      visit: {type: category, levels: [first, second]}\n"
              "      score: {type: number}")


def run(write_plan, tmp_path, columns: str, csv: str, analyses: str, seed: int = 4242) -> dict:
    text = HEAD.format(seed=seed, columns=columns, analyses=analyses)
    plan = write_plan(text, {"d.csv": csv})
    record = run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record
    return {a["id"]: a for a in record["analyses"]}


def ivs(entry: dict) -> dict:
    return {i["method"]: i for i in entry["intervals"]}


def mc_sd(interval: dict, end: str) -> float:
    """The Monte Carlo s.d. of an endpoint, from its (about 95%) order-statistic range."""
    low, high = interval["monte_carlo"][end]
    return (high - low) / (2 * 1.959963984540054)


def test_bs_mouse_exhaustive_from_a_plan(write_plan, tmp_path):
    result = run(write_plan, tmp_path, "      days: {type: number}", DAYS_CSV, """
  - id: mean
    data: d
    outcome: days
    statistic: mean
    method: bootstrap
    exhaustive: true
    confidence: 0.9
    intervals: [percentile, basic, normal, bca]
  - id: median
    role: secondary
    data: d
    outcome: days
    statistic: median
    method: bootstrap
    exhaustive: true
    intervals: [percentile]
""")
    mean, median = result["mean"], result["median"]
    assert mean["exact"] is True and mean["resamples"] == 1716  # identity 10
    assert mean["details"]["distinct_resamples"] == 1716 and mean["scheme"].startswith("exhaustive")
    # Source: V-MOUSE-BOOT ideal SEs (exact); E&T Table 2.2 ∞ column 23.36 / 37.83 (from memory)
    assert mean["standard_error"] == pytest.approx(23.3635234373, rel=1e-10)
    assert median["standard_error"] == pytest.approx(37.8346743939, rel=1e-10)
    # Source: V-MOUSE-BOOT ideal 90% percentile interval (49.4286, 126.7143), exact
    assert (ivs(mean)["percentile"]["lower"], ivs(mean)["percentile"]["upper"]) == pytest.approx(
        (346 / 7, 887 / 7), rel=1e-12)
    assert mean["monte_carlo"]["standard_error_sd"] == 0.0 and ivs(mean)["percentile"]["monte_carlo"] is None
    assert mean["distribution"]["weights_sha256"]
    assert abs(sum(mean["distribution"]["histogram"]["probabilities"]) - 1) < 1e-9


def test_jk_patch_and_ideal_bootstrap_from_a_plan(write_plan, tmp_path):
    csv = "z,y\n" + "".join(f"{o - p},{n - o}\n" for p, o, n in zip(PLACEBO, OLD, NEW))
    result = run(write_plan, tmp_path, "      z: {type: number}\n      y: {type: number}", csv, """
  - id: jack
    role: secondary
    data: d
    outcome: y
    predictor: z
    statistic: ratio
    method: jackknife
  - id: ideal
    role: secondary
    data: d
    outcome: y
    predictor: z
    statistic: ratio
    method: bootstrap
    exhaustive: true
    confidence: 0.9
    intervals: [percentile, bca]
""")
    jack, ideal = result["jack"], result["ideal"]
    # Source: V-PATCH (exact); θ̂ = −.0713, bias .0080 published, as cited
    assert jack["estimate"] == pytest.approx(-0.0713060959025602, rel=1e-12)
    assert jack["bias"] == pytest.approx(0.0080024883581075, rel=1e-12)
    assert jack["standard_error"] == pytest.approx(0.1055277853799895, rel=1e-12)
    assert jack["details"]["corrected_estimate"] == pytest.approx(-0.0793085842606676, rel=1e-12)
    # Source: V-PATCH full enumeration of 6435 resamples (exact)
    assert ideal["resamples"] == 6435
    assert ideal["bias"] == pytest.approx(0.00776050566338, rel=1e-10)
    assert ideal["standard_error"] == pytest.approx(0.10231380623193, rel=1e-10)
    assert (ivs(ideal)["percentile"]["lower"], ivs(ideal)["percentile"]["upper"]) == pytest.approx(
        (-0.211455, 0.120958), abs=1e-6)


def test_bs_law_intervals_spearman_and_slope(write_plan, tmp_path):
    csv = "lsat,gpa\n" + "".join(f"{x},{y}\n" for x, y in LAW)
    result = run(write_plan, tmp_path, "      lsat: {type: number}\n      gpa: {type: number}", csv, """
  - id: r
    role: secondary
    data: d
    outcome: gpa
    predictor: lsat
    statistic: correlation
    method: bootstrap
    resamples: 2000
    confidence: 0.9
    intervals: [percentile, bca]
  - id: rho
    role: secondary
    data: d
    outcome: gpa
    predictor: lsat
    statistic: spearman
    method: jackknife
  - id: slope
    role: secondary
    data: d
    outcome: gpa
    predictor: lsat
    statistic: slope
    method: bootstrap
    resamples: 500
    intervals: [percentile, studentized]
    studentized_se: jackknife
""", seed=12345)
    r = result["r"]
    # Source: V-LAW-BOOT (MC, B = 10⁶): percentile 90% (0.5227, 0.9476), BCa (0.4299, 0.9272);
    # tolerance 4 MC s.d. of the endpoint at B = 2000 (order-statistic estimate, V-TOL)
    for method, (lo, hi) in {"percentile": (0.5227, 0.9476), "bca": (0.4299, 0.9272)}.items():
        iv = ivs(r)[method]
        assert abs(iv["lower"] - lo) <= 4 * mc_sd(iv, "lower"), (method, iv)
        assert abs(iv["upper"] - hi) <= 4 * mc_sd(iv, "upper"), (method, iv)
    assert abs(r["standard_error"] - 0.1338) <= 0.0103  # Source: V-LAW-BOOT, ±4 s.d. at B = 2000
    x, y = np.array(LAW).T
    assert result["rho"]["estimate"] == pytest.approx(stats.spearmanr(x, y).statistic, rel=1e-12)  # scipy reference
    assert result["slope"]["estimate"] == pytest.approx(stats.linregress(x, y).slope, rel=1e-12)  # scipy reference
    assert result["slope"]["details"]["studentized_se"]["statistic_evaluations"] == 500 * 16
    assert "jackknife-non-smooth" in [w["code"] for w in result["rho"]["warnings"]]


def test_bs_spatial_five_intervals_from_a_plan(write_plan, tmp_path):
    csv = "a\n" + "\n".join(map(str, SPATIAL_A)) + "\n"
    result = run(write_plan, tmp_path, "      a: {type: number}", csv, """
  - id: var
    role: secondary
    data: d
    outcome: a
    statistic: plugin_variance
    method: bootstrap
    resamples: 2000
    confidence: 0.9
    intervals: [percentile, basic, normal, bca, studentized]
""", seed=777)["var"]
    # Source: V-SPATIAL: θ̂ = 171.534023668639, a = 0.0612401198123 (exact; E&T .061)
    assert result["estimate"] == pytest.approx(171.534023668639, rel=1e-12)
    assert result["details"]["acceleration"] == pytest.approx(0.0612401198123, rel=1e-10)
    iv = ivs(result)
    # Source: V-SPATIAL BCa 90% (115.8, 261.7); suggested tolerance at B = 2000 ±4 / ±8
    assert abs(iv["bca"]["lower"] - 115.765) <= 4 and abs(iv["bca"]["upper"] - 261.675) <= 8
    # Source: V-SPATIAL MC (B = 2×10⁶): percentile (97.870, 235.688), basic (107.380, 245.198);
    # percentile endpoint MC s.d. at B = 2000: 1.72 / 2.09 (V-SPATIAL), 4 s.d.
    assert abs(iv["percentile"]["lower"] - 97.870) <= 4 * 1.72
    assert abs(iv["percentile"]["upper"] - 235.688) <= 4 * 2.09
    assert abs(iv["basic"]["lower"] - 107.380) <= 4 * 2.09 and abs(iv["basic"]["upper"] - 245.198) <= 4 * 1.72
    # normal, bias-corrected, against the ideal values: SE 41.8328169, bias −6.59746 (V-SPATIAL, exact)
    z = stats.norm.ppf(0.95)
    centre = 171.534023668639 + 6.59746
    for end, ideal in (("lower", centre - z * 41.8328169), ("upper", centre + z * 41.8328169)):
        assert abs(iv["normal"][end] - ideal) <= 4 * mc_sd(iv["normal"], end)
    # Source: V-SPATIAL bootstrap-t with the delta SE (111.21, 292.38); ±25 at B = 2000;
    # and it reaches further right than BCa (E&T Table 14.2)
    assert result["details"]["studentized_se"]["method"] == "analytic"
    assert abs(iv["studentized"]["upper"] - 292.38) <= 25 and abs(iv["studentized"]["lower"] - 111.21) <= 25
    assert iv["studentized"]["upper"] > iv["bca"]["upper"]


def test_percentile_basic_bca_agree_with_scipy_for_pairs_of_columns(write_plan, tmp_path):
    b = 20000
    csv = "lsat,gpa\n" + "".join(f"{x},{y}\n" for x, y in LAW)
    result = run(write_plan, tmp_path, "      lsat: {type: number}\n      gpa: {type: number}", csv, f"""
  - id: r
    role: secondary
    data: d
    outcome: gpa
    predictor: lsat
    statistic: correlation
    method: bootstrap
    resamples: {b}
    intervals: [percentile, basic, bca]
""")["r"]
    x, y = np.array(LAW).T
    for method in ("percentile", "basic", "bca"):
        theirs = stats.bootstrap((x, y), lambda a, c, axis=-1: stats.pearsonr(a, c, axis=axis).statistic,
                                 paired=True, vectorized=True, n_resamples=b, method={"bca": "BCa"}.get(method, method),
                                 rng=np.random.default_rng(8)).confidence_interval  # scipy reference
        ours = ivs(result)[method]
        # both sides are Monte Carlo: 4 s.d. of the difference, sqrt(2) times one side's s.d.
        assert abs(ours["lower"] - theirs.low) <= 4 * math.sqrt(2) * mc_sd(ours, "lower"), (method, ours, theirs)
        assert abs(ours["upper"] - theirs.high) <= 4 * math.sqrt(2) * mc_sd(ours, "upper"), (method, ours, theirs)


def test_pairs_from_a_plan_give_the_ideal_paired_se(write_plan, tmp_path):
    csv = "patient,visit,score\n" + "".join(f"p{i},first,{a}\np{i},second,{b}\n" for i, (a, b) in
                                             enumerate(zip(HW_X, HW_Y)))
    cols = VISIT_COLS
    result = run(write_plan, tmp_path, cols, csv, """
  - id: paired
    role: secondary
    data: d
    outcome: score
    groups: {by: visit, compare: [first, second]}
    pairs: patient
    statistic: mean_difference
    method: bootstrap
    exhaustive: true
    intervals: [percentile]
  - id: unpaired
    role: secondary
    data: d
    outcome: score
    groups: {by: visit, compare: [first, second]}
    statistic: mean_difference
    method: bootstrap
    resamples: 200
    intervals: [percentile]
""")
    d = np.array(HW_X) - np.array(HW_Y)
    paired = result["paired"]
    assert paired["scheme"] == "exhaustive enumeration of every distinct resample of pairs"
    assert paired["resamples"] == 24310  # identity 10, n = 9
    # identity 7 on the differences: ideal Var* = m2(d)/n
    assert paired["standard_error"] == pytest.approx(math.sqrt(np.var(d) / d.size), rel=1e-10)
    assert paired["design"]["pairs"] == "patient"
    # the same patient in both groups without pairs declared: the record warns
    assert "ids-in-both-groups" not in [w["code"] for w in paired["warnings"]]
    assert "ids-in-both-groups" in [w["code"] for w in result["unpaired"]["warnings"]]


def test_incomplete_pairs_are_refused(write_plan, tmp_path):
    from planrunner.errors import DataError
    csv = "patient,visit,score\np1,first,1\np1,second,2\np2,first,3\np2,second,5\np3,first,4\n"
    cols = VISIT_COLS
    with pytest.raises(DataError, match=r"pair .p3. \(column .patient.\) has no row in group .second."):
        run(write_plan, tmp_path, cols, csv, """
  - id: paired
    role: secondary
    data: d
    outcome: score
    groups: {by: visit, compare: [first, second]}
    pairs: patient
    statistic: mean_difference
    method: bootstrap
""")


CLINIC_COLS = ("      clinic: {type: text, identifier: true}\n      arm: {type: category, levels: [new, usual]}\n"
               "      hours: {type: number}")


def clinic_csv() -> str:
    """Invented: recovery hours of 3 patients in each of 8 clinics per arm."""
    rng = np.random.default_rng(20261201)
    lines = ["clinic,arm,hours"]
    for arm, shift in (("new", -3.0), ("usual", 0.0)):
        for c in range(8):
            effect = rng.normal(0, 4)
            lines += [f"{arm}-{c},{arm},{40 + shift + effect + rng.normal(0, 2):.2f}" for _ in range(3)]
    return "\n".join(lines) + "\n"


def test_clusters_from_a_plan(write_plan, tmp_path):
    csv = clinic_csv()
    result = run(write_plan, tmp_path, CLINIC_COLS, csv, """
  - id: boot
    role: secondary
    data: d
    outcome: hours
    groups: {by: arm, compare: [new, usual]}
    clusters: clinic
    statistic: mean_difference
    method: bootstrap
    resamples: 2000
    intervals: [percentile, bca, normal]
  - id: jack
    role: secondary
    data: d
    outcome: hours
    groups: {by: arm, compare: [new, usual]}
    clusters: clinic
    statistic: mean_difference
    method: jackknife
  - id: naive
    role: secondary
    data: d
    outcome: hours
    groups: {by: arm, compare: [new, usual]}
    statistic: mean_difference
    method: bootstrap
    resamples: 200
    intervals: [percentile]
""")
    rows = [line.split(",") for line in csv.splitlines()[1:]]
    means = {arm: np.array([np.mean([float(h) for c, a, h in rows if c == f"{arm}-{k}"]) for k in range(8)])
             for arm in ("new", "usual")}
    # identity 2 on cluster means (equal sizes), summed over the two arms (identity 6)
    expected = math.sqrt(sum(np.var(m, ddof=1) / 8 for m in means.values()))
    assert result["jack"]["standard_error"] == pytest.approx(expected, rel=1e-12)
    assert result["jack"]["scheme"] == "delete-one cluster within each group"
    boot = result["boot"]
    assert boot["scheme"] == "whole clusters resampled, each group separately"
    assert boot["details"]["clusters"] == [8, 8]
    # identity 9: cluster bootstrap Var* = Σ_arms sd²_plugin(cluster means)/G; kurtosis bound 4 for the tolerance
    ideal = math.sqrt(sum(np.var(m) / 8 for m in means.values()))
    assert abs(boot["standard_error"] - ideal) <= 4 * ideal * math.sqrt(3 / (4 * 2000))
    assert "repeated-ids" in [w["code"] for w in result["naive"]["warnings"]]
    assert "few-clusters" in [w["code"] for w in boot["warnings"]]


def test_blocks_and_parametric_from_a_plan(write_plan, tmp_path):
    rng = np.random.default_rng(7)  # invented daily readings with serial dependence
    level = np.cumsum(rng.normal(0, 1, 60)) * 0.3 + 20
    order = rng.permutation(60)  # rows stored out of time order: the plan's order column sorts them
    csv = "day,reading\n" + "".join(f"{i},{level[i]:.3f}\n" for i in order)
    result = run(write_plan, tmp_path, "      day: {type: integer}\n      reading: {type: number}", csv, """
  - id: moving
    role: secondary
    data: d
    outcome: reading
    order: day
    blocks: {scheme: moving, length: 6}
    statistic: mean
    method: bootstrap
    resamples: 500
  - id: stationary
    role: secondary
    data: d
    outcome: reading
    order: day
    blocks: {scheme: stationary, length: 6}
    statistic: mean
    method: bootstrap
    resamples: 500
    intervals: [percentile, basic, normal]
  - id: expo
    role: secondary
    data: d
    outcome: reading
    parametric: exponential
    statistic: mean
    method: bootstrap
    resamples: 500
""")
    assert result["moving"]["scheme"] == "moving-block bootstrap, block length 6"
    assert [i["method"] for i in result["moving"]["intervals"]] == ["percentile"]  # BCa not defaulted in
    assert result["moving"]["details"]["blocks"] == {"scheme": "moving", "length": 6}
    # the record's numbers are those of the engine on the series in time order (same stream)
    from planrunner.engines.bootstrap import BootstrapOptions, bootstrap
    from planrunner.engines.statistics import get_statistic
    from planrunner.engines.streams import stream_for
    direct = bootstrap([np.round(level, 3)], get_statistic("mean"),
                       BootstrapOptions(500, 0.95, ("percentile",), blocks=("moving", 6)),
                       stream=stream_for(4242, "moving"))
    assert result["moving"]["standard_error"] == direct.standard_error
    assert result["stationary"]["details"]["blocks"] == {"scheme": "stationary", "mean_length": 6}
    expo = result["expo"]
    assert expo["scheme"] == "parametric: exponential model fitted by maximum likelihood"
    assert expo["details"]["fitted_parameters"] == [{"mean": pytest.approx(level.round(3).mean(), rel=1e-12)}]


def test_on_degenerate_fail_from_a_plan(write_plan, tmp_path):
    with pytest.raises(EngineError, match="replicates are equal"):
        # no events at all: a binary outcome that is all 0 passes the data checks, and every
        # bootstrap proportion is then 0
        run(write_plan, tmp_path, "      y: {type: boolean}", "y\n" + "no\n" * 12, """
  - id: flat
    role: secondary
    data: d
    outcome: y
    statistic: proportion
    method: bootstrap
    resamples: 100
    on_degenerate: fail
""")


def test_statistic_parameters_reach_the_record(write_plan, tmp_path):
    result = run(write_plan, tmp_path, "      days: {type: number}", DAYS_CSV, """
  - id: q90
    role: secondary
    data: d
    outcome: days
    statistic: quantile
    quantile: 0.9
    method: jackknife
  - id: trimmed
    role: secondary
    data: d
    outcome: days
    statistic: trimmed_mean
    trim: 0.2
    method: bootstrap
    resamples: 200
    intervals: [percentile]
""")
    assert result["q90"]["estimate"] == pytest.approx(np.quantile(TREATMENT, 0.9), rel=1e-15)  # numpy reference
    assert result["q90"]["statistic_parameter"] == {"quantile": 0.9}
    assert result["q90"]["statistic_label"] == "0.9 quantile"
    assert result["trimmed"]["estimate"] == pytest.approx(stats.trim_mean(TREATMENT, 0.2), rel=1e-15)  # scipy reference


def test_bs_law_parametric_bivariate_normal(write_plan, tmp_path):
    csv = "lsat,gpa\n" + "".join(f"{x},{y}\n" for x, y in LAW)
    b = 2000
    result = run(write_plan, tmp_path, "      lsat: {type: number}\n      gpa: {type: number}", csv, f"""
  - id: param
    role: secondary
    data: d
    outcome: gpa
    predictor: lsat
    statistic: correlation
    method: bootstrap
    parametric: normal
    resamples: {b}
""", seed=3200)["param"]
    fit = result["details"]["fitted_parameters"][0]
    x, y = np.array(LAW).T
    assert fit["mean"] == pytest.approx([x.mean(), y.mean()], rel=1e-12)
    assert fit["covariance"][0][1] == pytest.approx(np.cov(x, y, bias=True)[0, 1], rel=1e-12)
    # Source: V-LAW-BOOT parametric normal SE 0.119270 (MC, B = 4×10⁵; E&T .124 published, as cited);
    # 4 MC s.d. at B = 2000 with the kurtosis bound κ ≤ 4 of V-LAW-BOOT: 4·0.1193·sqrt(3/(4B))
    assert abs(result["standard_error"] - 0.119270) <= 4 * 0.119270 * math.sqrt(3 / (4 * b))


def test_saved_distribution_matches_its_hash(write_plan, tmp_path):
    import hashlib
    result = run(write_plan, tmp_path, "      days: {type: number}", DAYS_CSV, """
  - id: kept
    role: secondary
    data: d
    outcome: days
    statistic: mean
    method: bootstrap
    resamples: 300
    intervals: [percentile]
    save_distribution: true
  - id: plain
    role: secondary
    data: d
    outcome: days
    statistic: mean
    method: bootstrap
    resamples: 300
    intervals: [percentile]
""")
    kept = result["kept"]["distribution"]
    assert len(kept["values"]) == 300 and "values" not in result["plain"]["distribution"]
    digest = hashlib.sha256(np.array(kept["values"], dtype="<f8").tobytes()).hexdigest()
    assert digest == kept["sha256"]
    assert np.std(kept["values"], ddof=1) == pytest.approx(result["kept"]["standard_error"], rel=1e-12)
