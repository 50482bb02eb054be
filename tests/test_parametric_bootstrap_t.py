"""The parametric bootstrap-t with the model's own standard error (`studentized_se: model`).

Identity 11: under the fitted exponential model ȳ*/ȳ ~ Gamma(n, 1/n), so the pivot
t* = (ȳ* − ȳ)/(ȳ*/√n) has the law of the exact pivot, and the bootstrap-t interval
(ȳ − ŝe·t*₁₋α/₂, ȳ − ŝe·t*_α/₂), ŝe = ȳ/√n, is the exact chi-square interval
(2nȳ/χ²_{2n, 1−α/2}, 2nȳ/χ²_{2n, α/2}) as B → ∞; under the normal model the pivot with the maximum-
likelihood σ̂ (divisor n) gives the exact Student t interval ȳ ∓ t_{n−1, 1−α/2}·s/√n. Checked within
Monte Carlo error (V-TOL: 4 s.d. of each end, the s.d. the engine states).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from planrunner.engines.bootstrap import BootstrapOptions, bootstrap
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import stream_for
from planrunner.errors import EngineError

# Source: E&T Table 2.1 (V-MOUSE-BOOT, published, confirmed)
TREATMENT = np.array([94, 197, 16, 38, 99, 141, 23], dtype=float)
CONTROL = np.array([52, 104, 146, 10, 51, 30, 40, 27, 46], dtype=float)


def _boot(samples, model, *, B=20000, confidence=0.95, alternative="two-sided", statistic="mean", **kw):
    options = BootstrapOptions(resamples=B, confidence=confidence, intervals=("studentized",), parametric=model,
                               studentized_se="model", alternative=alternative, **kw)
    return bootstrap(samples, get_statistic(statistic), options, stream=stream_for(2026, "boot-t"))


def _within(end: float, exact: float, sd: float | None) -> None:
    assert sd is not None and sd > 0
    assert abs(end - exact) <= 4 * sd, (end, exact, sd)  # V-TOL: 4 Monte Carlo s.d.


def test_identity_11_exponential_bootstrap_t_is_the_exact_chi_square_interval() -> None:
    n, mean = TREATMENT.size, TREATMENT.mean()
    r = _boot([TREATMENT], "exponential")
    assert r.details["studentized_se"]["method"] == "model"
    assert r.details["se_hat"] == pytest.approx(mean / math.sqrt(n), rel=1e-12)
    (iv,) = r.intervals
    assert iv.monte_carlo_sd is not None
    exact = (2 * n * mean / stats.chi2.ppf(0.975, 2 * n),  # scipy reference
             2 * n * mean / stats.chi2.ppf(0.025, 2 * n))
    _within(iv.lower, exact[0], iv.monte_carlo_sd[0])
    _within(iv.upper, exact[1], iv.monte_carlo_sd[1])
    # one-sided: the 95% lower bound is 2nȳ/χ²_{2n, 0.95}
    low = _boot([TREATMENT], "exponential", alternative="greater").intervals[0]
    assert low.side == "lower" and low.upper == math.inf and low.monte_carlo_sd is not None
    _within(low.lower, 2 * n * mean / stats.chi2.ppf(0.95, 2 * n), low.monte_carlo_sd[0])  # scipy reference


def test_identity_11_normal_bootstrap_t_is_the_exact_student_interval() -> None:
    n, mean, s = TREATMENT.size, TREATMENT.mean(), TREATMENT.std(ddof=1)
    r = _boot([TREATMENT], "normal")
    assert r.details["se_hat"] == pytest.approx(TREATMENT.std() / math.sqrt(n), rel=1e-12)  # σ̂ with divisor n
    (iv,) = r.intervals
    assert iv.monte_carlo_sd is not None
    half = stats.t.ppf(0.975, n - 1) * s / math.sqrt(n)  # scipy reference
    _within(iv.lower, mean - half, iv.monte_carlo_sd[0])
    _within(iv.upper, mean + half, iv.monte_carlo_sd[1])


def test_model_standard_errors_of_two_groups_poisson_and_binomial() -> None:
    counts_a = np.array([3, 0, 2, 5, 1, 4, 2, 2, 3, 1], dtype=float)
    counts_b = np.array([1, 0, 2, 1, 0, 3, 1, 1], dtype=float)
    pois = _boot([counts_a, counts_b], "poisson", B=999, statistic="mean_difference")
    # Poisson: var(ȳ) = λ/n, difference of independent means: the summed variances
    assert pois.details["se_hat"] == pytest.approx(math.sqrt(2.3 / 10 + 1.125 / 8), rel=1e-12)
    assert "difference" in pois.details["studentized_se"]["formula"]
    binom = _boot([counts_a], "binomial", B=999, trials=5)
    # binomial with 5 trials: var(ȳ) = 5 p (1 − p)/n, p = 2.3/5
    assert binom.details["se_hat"] == pytest.approx(math.sqrt(2.3 * (1 - 2.3 / 5) / 10), rel=1e-12)
    lo, hi = binom.intervals[0].lower, binom.intervals[0].upper
    assert lo is not None and hi is not None and lo < 2.3 < hi


def test_scale_invariance_of_the_exponential_bootstrap_t() -> None:
    base = _boot([TREATMENT], "exponential", B=2000).intervals[0]
    for scale in (1e-6, 1e5):
        scaled = _boot([TREATMENT * scale], "exponential", B=2000).intervals[0]
        assert scaled.lower == pytest.approx(scale * base.lower, rel=1e-9)
        assert scaled.upper == pytest.approx(scale * base.upper, rel=1e-9)


def test_normal_bootstrap_t_follows_a_shift() -> None:
    base = _boot([TREATMENT], "normal", B=2000).intervals[0]
    shifted = _boot([TREATMENT + 1e6], "normal", B=2000).intervals[0]
    assert shifted.lower - 1e6 == pytest.approx(base.lower, abs=1e-6)
    assert shifted.upper - 1e6 == pytest.approx(base.upper, abs=1e-6)


def test_model_se_is_refused_without_a_model_or_for_other_statistics() -> None:
    with pytest.raises(EngineError, match="needs the parametric bootstrap"):
        bootstrap([TREATMENT], get_statistic("mean"),
                  BootstrapOptions(resamples=99, confidence=0.95, intervals=("studentized",), studentized_se="model"),
                  stream=stream_for(1, "x"))
    with pytest.raises(EngineError, match="means and differences of means"):
        _boot([TREATMENT], "exponential", B=99, statistic="median")


PLAN = """\
plan: boot-t
title: Parametric bootstrap-t from a plan
seed: 11
datasets:
  d:
    file: data.csv
    columns:
      y: {type: number, min: 0}
analyses:
  - id: waiting-time
    data: d
    outcome: y
    statistic: mean
    method: bootstrap
    parametric: exponential
    resamples: 4000
    intervals: [studentized, percentile]
    studentized_se: model
"""


def test_model_se_from_a_plan(tmp_path: Path) -> None:
    from planrunner.cli.main import main

    (tmp_path / "data.csv").write_text("y\n" + "\n".join(str(v) for v in TREATMENT) + "\n")
    (tmp_path / "plan.yaml").write_text(PLAN)
    assert main(["run", str(tmp_path / "plan.yaml"), "--out", str(tmp_path / "runs"), "--quiet"]) == 0
    record = json.loads(next((tmp_path / "runs").glob("boot-t-*/record.json")).read_text())
    (entry,) = record["analyses"]
    assert entry["settings"]["studentized_se"] == "model"
    assert entry["details"]["studentized_se"]["method"] == "model"
    assert "exponential" in entry["details"]["studentized_se"]["formula"]
    n, mean = TREATMENT.size, TREATMENT.mean()
    studentized = entry["intervals"][0]
    band = entry["monte_carlo"]["intervals"][0]
    _within(studentized["lower"], 2 * n * mean / stats.chi2.ppf(0.975, 2 * n), band["lower_sd"])  # scipy reference
    _within(studentized["upper"], 2 * n * mean / stats.chi2.ppf(0.025, 2 * n), band["upper_sd"])  # scipy reference
