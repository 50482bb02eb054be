"""Speed of the model bootstrap beside a statsmodels fit-per-resample loop (not part of the tests).

Rows (invented data, seed fixed):

* M1 adjusted mean difference, n = 1e4, 5 covariates, B = 1e4, cases bootstrap (batched normal
  equations) against statsmodels OLS refitted on each resample's rows;
* M2 the same with the wild bootstrap (one precomputed projection) against statsmodels OLS refitted on
  each y*;
* M3 standardised risk difference, n = 1e4, 5 covariates, B = 1e4, cases bootstrap (batched Newton
  steps) against statsmodels GLM(Binomial) refitted and predicted on each resample;
* M4 the same with a studentized interval (each resample's delta-method standard error) against
  statsmodels Logit refitted on each resample with its average discrete change and that change's
  standard error (``get_margeff(at='overall', dummy=True)``, cov_type='HC0').

The statsmodels loop is timed on ``--loop`` resamples and scaled to B (its cost is linear in B; the
scaling is stated in the output). Run: ``python benchmarks/models_vs_statsmodels.py [--quick] [--rows M3,M4]``.
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable
from typing import Any

import numpy as np

from planrunner.engines.modelboot import ModelBootstrapOptions, model_bootstrap
from planrunner.engines.models import Design
from planrunner.engines.streams import stream_for


def _data(n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    group = (rng.random(n) < 0.5).astype(float)
    covariates = rng.normal(size=(n, 5))
    y = 1.0 + 0.4 * group + covariates @ np.array([0.5, -0.3, 0.2, 0.0, 0.1]) + rng.normal(size=n)
    eta = -0.5 + 0.6 * group + covariates @ np.array([0.4, -0.2, 0.1, 0.0, 0.3])
    event = (rng.random(n) < 1.0 / (1.0 + np.exp(-eta))).astype(float)
    return y, event, group, covariates


def _timed(call: Callable[[], Any]) -> float:
    start = time.perf_counter()
    call()
    return time.perf_counter() - start


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--quick", action="store_true", help="n = 2000, B = 1000")
    parser.add_argument("--loop", type=int, default=200, help="resamples the statsmodels loop is timed on")
    parser.add_argument("--rows", default="M1,M2,M3,M4", help="the rows to time, e.g. M3,M4")
    args = parser.parse_args(argv)
    import statsmodels.api as sm

    n, resamples = (2000, 1000) if args.quick else (10_000, 10_000)
    y, event, group, covariates = _data(n, 1)
    x = np.column_stack([np.ones(n), group, covariates])
    names = ("(intercept)", "group", *[f"c{k}" for k in range(5)])
    cells = group.astype(np.intp)
    linear = Design(y=y, x=x, names=names, cells=cells, clusters=None)
    binary = Design(y=event, x=x, names=names, cells=cells, clusters=None)
    rng = np.random.default_rng(2)

    def cases_rows() -> np.ndarray:
        rows = [np.flatnonzero(cells == c) for c in (0, 1)]
        return np.concatenate([r[rng.integers(0, r.size, r.size)] for r in rows])

    def ols_loop() -> None:
        for _ in range(args.loop):
            rows = cases_rows()
            sm.OLS(y[rows], x[rows]).fit().params[1]

    fitted = sm.OLS(y, x).fit()

    def wild_loop() -> None:
        for _ in range(args.loop):
            v = np.where(rng.random(n) < 0.5, -1.0, 1.0)
            sm.OLS(fitted.fittedvalues + fitted.resid * v, x).fit().params[1]

    def glm_loop() -> None:
        x1, x0 = x.copy(), x.copy()
        x1[:, 1], x0[:, 1] = 1.0, 0.0
        for _ in range(args.loop):
            rows = cases_rows()
            fit = sm.GLM(event[rows], x[rows], family=sm.families.Binomial()).fit()
            float(fit.predict(x1[rows]).mean() - fit.predict(x0[rows]).mean())

    def margeff_loop() -> None:
        for _ in range(args.loop):
            rows = cases_rows()
            margins = sm.Logit(event[rows], x[rows]).fit(disp=0, cov_type="HC0").get_margeff(
                at="overall", method="dydx", dummy=True)
            float(margins.margeff[0]), float(margins.margeff_se[0])

    def ours(design: Design, statistic: str, model: str, scheme: str,
             intervals: tuple[str, ...] = ("percentile",)) -> Callable[[], Any]:
        options = ModelBootstrapOptions(resamples=resamples, confidence=0.95, intervals=intervals,
                                        model=model, model_resampling=scheme)
        return lambda: model_bootstrap(design, statistic, options, stream=stream_for(7, statistic + scheme))

    rows = [("M1 adjusted mean difference, cases", ours(linear, "adjusted_mean_difference", "linear", "cases"),
             ols_loop),
            ("M2 adjusted mean difference, wild", ours(linear, "adjusted_mean_difference", "linear", "wild"),
             wild_loop),
            ("M3 standardised risk difference, cases",
             ours(binary, "standardized_risk_difference", "logistic", "cases"), glm_loop),
            ("M4 standardised risk difference, cases, studentized (delta-method SE per resample)",
             ours(binary, "standardized_risk_difference", "logistic", "cases", ("percentile", "studentized")),
             margeff_loop)]
    chosen = set(args.rows.split(","))
    rows = [row for row in rows if row[0].split()[0] in chosen]
    print(f"n = {n}, 5 covariates, B = {resamples}; statsmodels timed on {args.loop} resamples and scaled to B")
    print("| work | planrunner s | statsmodels loop s (scaled) | ratio |")
    print("|---|---|---|---|")
    for label, mine, theirs in rows:
        planrunner_s = _timed(mine)
        loop_s = _timed(theirs) * resamples / args.loop
        print(f"| {label} | {planrunner_s:.2f} | {loop_s:.1f} | {loop_s / planrunner_s:.0f}× |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
