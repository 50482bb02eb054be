"""Bootstrap p-values of a stated null value (`null_value:`), by inverting the pre-specified interval.

The p-value is the smallest α at which the one-sided bound of the first listed interval method, at
confidence 1 − α, excludes the null value (Efron & Tibshirani 1993, §15.4; Davison & Hinkley 1997,
§4.4; from memory). Checked by identity 21 (that duality, for every method) and against outside
values: the exponential parametric bootstrap-t p-value converges to the exact chi-square test of an
exponential mean, the parametric percentile p-value to the gamma law of ȳ* (`scipy.stats.chi2`,
`scipy.stats.gamma`; identity 11), the exhaustive percentile p-value of the median to the binomial law
of identity 8, and the normal method's p-value is Φ of its z (`scipy.stats.norm`). The stated Monte
Carlo s.d. is checked against the spread over 200 independent streams (V-TOL).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from planrunner.engines.bootstrap import BootstrapOptions, bootstrap
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import stream_for

SAMPLE = np.random.default_rng(7).lognormal(mean=1.0, sigma=0.6, size=15)  # invented, continuous
# Source: E&T Table 2.1 (V-MOUSE-BOOT, published, confirmed)
TREATMENT = np.array([94, 197, 16, 38, 99, 141, 23], dtype=float)
ALL = ("percentile", "basic", "normal", "bca", "studentized")


def _run(method: str, null: float | None, *, alternative="greater", samples=(SAMPLE,), B=1999, seed=2026,
         statistic="mean", confidence=0.95, **kw):
    options = BootstrapOptions(resamples=B, confidence=confidence, intervals=(method,), alternative=alternative,
                               null_value=null, **kw)
    return bootstrap(samples, get_statistic(statistic), options, stream=stream_for(seed, "p-values"))


@pytest.mark.parametrize("method", ALL)
def test_identity_21_p_below_alpha_exactly_when_the_bound_excludes_the_null(method: str) -> None:
    # B = 1999 and α = 0.05: αB and αB/2 are not whole numbers, so no count sits on the boundary
    alpha = 0.05
    lower = _run(method, None).intervals[0].lower
    upper = _run(method, None, alternative="less").intervals[0].upper
    two = _run(method, None, alternative="two-sided").intervals[0]
    replicates = np.sort(_run(method, None).distribution)
    grid = (replicates[1:] + replicates[:-1])[::37] / 2  # midpoints: never a replicate itself
    for null in grid:
        g = _run(method, float(null)).null_test
        l_ = _run(method, float(null), alternative="less").null_test
        t = _run(method, float(null), alternative="two-sided").null_test
        assert g is not None and l_ is not None and t is not None and g.p_value is not None
        assert (g.p_value < alpha) == (null < lower), (method, null, g.p_value, lower)
        assert (l_.p_value < alpha) == (null > upper), (method, null, l_.p_value, upper)
        assert (t.p_value < alpha) == (null < two.lower or null > two.upper), (method, null, t.p_value)
        assert t.p_value == pytest.approx(min(1.0, 2 * min(g.p_value, l_.p_value)), rel=1e-12)
        assert g.p_greater == t.p_greater and l_.p_less == t.p_less


@pytest.mark.parametrize("null", [40.0, 60.0])
def test_exponential_bootstrap_t_p_value_is_the_exact_chi_square_test(null: float) -> None:
    n, mean = TREATMENT.size, TREATMENT.mean()
    r = _run("studentized", null, samples=(TREATMENT,), B=40000, parametric="exponential", studentized_se="model")
    exact = stats.chi2.sf(2 * n * mean / null, 2 * n)  # scipy reference: H0 μ = μ0 against μ > μ0
    nt = r.null_test
    assert nt is not None and nt.p_value is not None and nt.monte_carlo_sd is not None
    assert abs(nt.p_value - exact) <= 4 * nt.monte_carlo_sd  # V-TOL
    # the percentile p-value is P*(ȳ* ≤ μ0), ȳ* ~ Gamma(n, ȳ/n) (identity 11)
    perc = _run("percentile", null, samples=(TREATMENT,), B=40000, parametric="exponential").null_test
    assert perc is not None and perc.p_value is not None and perc.monte_carlo_sd is not None
    assert abs(perc.p_value - stats.gamma.cdf(null, n, scale=mean / n)) <= 4 * perc.monte_carlo_sd  # scipy reference


def test_exhaustive_percentile_p_value_of_the_median_is_binomial() -> None:
    # identity 8: P*(med* ≤ x_(k)) = P(Bin(n, k/n) ≥ (n + 1)/2); a tie at the null value counts as ≤
    ordered = np.sort(TREATMENT)
    n = ordered.size
    for k in (2, 3, 4, 5):
        r = _run("percentile", float(ordered[k - 1]), samples=(TREATMENT,), statistic="median", exhaustive=True)
        nt = r.null_test
        assert nt is not None and nt.monte_carlo_sd is None and nt.monte_carlo_interval is None
        want = stats.binom.sf((n + 1) / 2 - 1, n, k / n)  # scipy reference
        assert nt.p_greater == pytest.approx(want, rel=1e-9)


def test_normal_p_value_is_phi_of_its_z() -> None:
    r = _run("normal", 2.1, alternative="two-sided")
    nt = r.null_test
    assert nt is not None and r.standard_error is not None and r.bias is not None
    z = (2.1 - (r.estimate - r.bias)) / r.standard_error
    assert nt.p_greater == pytest.approx(stats.norm.cdf(z), rel=1e-12)  # scipy reference
    assert nt.p_less == pytest.approx(stats.norm.sf(z), rel=1e-12)  # scipy reference


@pytest.mark.parametrize("method", ALL)
def test_stated_monte_carlo_sd_matches_the_spread_over_streams(method: str) -> None:
    # V-TOL: the s.d. of 200 p-values from independent streams, over the mean stated s.d.; an
    # estimate from 200 values is within ±15% about 97% of the time
    values, stated = [], []
    for k in range(200):
        nt = _run(method, 2.3, B=1000, seed=k).null_test
        assert nt is not None and nt.monte_carlo_sd is not None
        values.append(nt.p_value)
        stated.append(nt.monte_carlo_sd)
    ratio = float(np.std(values, ddof=1) / np.mean(stated))
    assert 0.8 <= ratio <= 1.2, (method, ratio)


def test_null_beyond_every_replicate_is_floored_never_zero() -> None:
    one = _run("percentile", -100.0).null_test
    assert one is not None and one.floored and one.p_value == pytest.approx(1 / 1999)
    two = _run("percentile", -100.0, alternative="two-sided").null_test
    assert two is not None and two.floored and two.p_value == pytest.approx(2 / 1999)
    exact = _run("percentile", -100.0, samples=(TREATMENT,), exhaustive=True).null_test
    assert exact is not None and exact.floored and 0 < exact.p_value < 1e-5


def test_p_values_follow_shifts_and_scales_of_data_and_null() -> None:
    for method in ALL:
        base = _run(method, 2.4, alternative="two-sided").null_test
        for shift, scale in ((1e6, 1.0), (0.0, 1e-4), (-30.0, 1e3)):
            moved = _run(method, shift + scale * 2.4, alternative="two-sided",
                         samples=(shift + scale * SAMPLE,)).null_test
            assert base is not None and moved is not None and base.p_value is not None
            assert moved.p_value == pytest.approx(base.p_value, rel=1e-6, abs=1e-9), method


def test_undefined_pre_specified_interval_gives_no_p_value_with_a_note() -> None:
    constant = np.full(12, 3.0)
    r = _run("bca", 1.0, samples=(constant,))
    assert r.null_test is not None and r.null_test.p_value is None and "no p-value" in (r.null_test.note or "")


PLAN = """\
plan: null-values
title: Bootstrap p-values from a plan
seed: 4
datasets:
  d:
    file: data.csv
    columns:
      y: {type: number}
analyses:
  - id: two-sided
    data: d
    outcome: y
    statistic: mean
    method: bootstrap
    resamples: 1999
    null_value: 2
    intervals: [percentile, bca]
  - id: upper
    role: secondary
    data: d
    outcome: y
    statistic: mean
    method: bootstrap
    resamples: 1999
    alternative: less
    null_value: 4.5
    intervals: [bca]
"""


def test_null_value_from_a_plan_reaches_record_and_reports(tmp_path: Path) -> None:
    from planrunner.cli.main import main

    (tmp_path / "data.csv").write_text("y\n" + "\n".join(f"{v:.4f}" for v in SAMPLE) + "\n")
    (tmp_path / "plan.yaml").write_text(PLAN)
    assert main(["run", str(tmp_path / "plan.yaml"), "--out", str(tmp_path / "runs"), "--quiet"]) == 0
    folder = next((tmp_path / "runs").glob("null-values-*"))
    record = json.loads((folder / "record.json").read_text())
    two, upper = record["analyses"]
    assert two["settings"]["null_value"] == 2 and two["alternative"] == "two-sided"
    nt = two["details"]["null_test"]
    assert nt["interval_inverted"] == "percentile" and nt["null_value"] == 2.0
    assert "Efron & Tibshirani (1993)" in nt["source"] and "15.4" in nt["source"]
    assert two["p_value"] == pytest.approx(min(1.0, 2 * min(nt["p_greater"], nt["p_less"])))
    assert two["monte_carlo"]["p_value_sd"] > 0 and len(two["monte_carlo"]["p_value_interval"]) == 2
    assert "Clopper-Pearson" in two["monte_carlo"]["p_value_interval_rule"]
    assert upper["details"]["null_test"]["interval_inverted"] == "bca"
    assert upper["p_value"] == upper["details"]["null_test"]["p_less"]
    assert "p-value of the null value 2 was obtained by inverting" in record["methods_text"]
    md = (folder / "report.md").read_text()
    html = (folder / "report.html").read_text()
    for text in (md, html):
        assert "two-sided, mean ≠ 2 (null value)" in text and "one-sided, mean &lt; 4.5 (null value)" in text
        assert "by inverting the BCa bounds" in text
        assert "dotted grey line marks the null value of the p-value (4.5)" in text  # the picture's text
    import jsonschema

    from planrunner.record.schemas import record_schema

    jsonschema.validate(record, record_schema())
