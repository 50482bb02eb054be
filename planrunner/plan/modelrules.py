"""Plan rules of the model statistics (a regression coefficient or a standardised effect) and their
bootstrap keys (`model_resampling`, `weights`, `impose_null`, `model`). Called from
`planrunner.plan.load`; each problem carries its plan path."""

from __future__ import annotations

from typing import Any

from planrunner.engines.statistics import Statistic
from planrunner.plan.problems import Problem

MODEL_KEYS = ("model_resampling", "weights", "impose_null", "model")
LOGISTIC_STATISTICS = ("standardized_risk_difference", "standardized_risk_ratio", "standardized_odds_ratio")


def model_checks(at: tuple, a: Any, statistic: Statistic) -> list[Problem]:
    """Every problem of a model statistic's analysis, or of model keys on another statistic."""
    out: list[Problem] = []
    if statistic.form != "model":
        for key in MODEL_KEYS:
            if getattr(a, key, None) is not None:
                out.append(Problem(at + (key,), f"{key} applies to the model statistics only",
                                   "remove the key, or use adjusted_mean_difference, a standardized_* statistic "
                                   "or coefficient"))
        return out
    if a.method == "permutation" and a.statistic == "adjusted_mean_difference":
        return out  # Freedman–Lane (plan/permrules.py holds its rules)
    if a.method != "bootstrap":
        out.append(Problem(at + ("method",), f"'{a.statistic}' is available with method: bootstrap only"
                           + (" (and adjusted_mean_difference with permutation)" if a.method == "permutation" else ""),
                           "use method: bootstrap (model_resampling: cases, residual, wild or wild-cluster)"))
        return out
    if a.impose_null and getattr(a, "decision", None) is not None:
        out.append(Problem(at + ("decision",), "a decision reads the pre-specified interval, and with "
                           "impose_null the replicates are drawn under the null, so they give a p-value and no "
                           "interval", "remove impose_null (the interval of the same scheme is then read), or "
                           "move the decision to an analysis without it"))
    precision = getattr(a, "precision", None)
    if a.impose_null and precision is not None and precision.interval_end_sd is not None:
        out.append(Problem(at + ("precision", "interval_end_sd"), "with impose_null there is no interval whose "
                           "ends a precision target could read", "give se_relative, or a fixed resamples"))
    for key in ("pairs", "order", "blocks", "parametric", "trials", "studentized_se", "inner_resamples"):
        if getattr(a, key) is not None:
            out.append(Problem(at + (key,), f"{key} does not apply to a model statistic",
                               "remove the key; model_resampling chooses how the model's data are resampled"))
    if a.exhaustive:
        out.append(Problem(at + ("exhaustive",), "exhaustive does not apply to a model statistic",
                           "remove the key (wild-cluster enumerates its sign vectors by itself)"))
    logistic = a.statistic in LOGISTIC_STATISTICS or a.model == "logistic"
    if a.model is not None and a.statistic != "coefficient":
        out.append(Problem(at + ("model",), f"'{a.statistic}' fixes its own model",
                           "remove model (it chooses between linear and logistic for coefficient only)"))
    if a.statistic == "coefficient" and a.model is None:
        out.append(Problem(at + ("statistic",), "coefficient needs the model it reads the coefficient from",
                           "add model: linear (least squares) or model: logistic"))
    scheme = a.model_resampling or "cases"
    if logistic and scheme != "cases":
        out.append(Problem(at + ("model_resampling",), f"{scheme} resampling needs a least-squares fit; a "
                           "logistic regression has no residuals to resample", "use model_resampling: cases"))
    if scheme == "residual" and a.clusters is not None:
        out.append(Problem(at + ("model_resampling",), "a residual bootstrap treats the residuals as exchangeable "
                           "across rows, which clusters contradict", "use model_resampling: wild-cluster or cases"))
    if scheme == "wild-cluster" and a.clusters is None:
        out.append(Problem(at + ("model_resampling",), "wild-cluster needs clusters", "add clusters: COLUMN"))
    if scheme == "wild" and a.clusters is not None:
        out.append(Problem(at + ("model_resampling",), "a wild bootstrap with one weight per row ignores the "
                           "declared clusters", "use model_resampling: wild-cluster"))
    if a.weights is not None and scheme not in ("wild", "wild-cluster"):
        out.append(Problem(at + ("weights",), "weights apply to the wild and wild-cluster schemes",
                           "remove weights, or use model_resampling: wild or wild-cluster"))
    if a.impose_null and scheme not in ("wild", "wild-cluster"):
        out.append(Problem(at + ("impose_null",), "impose_null applies to the wild and wild-cluster schemes",
                           "remove impose_null, or use model_resampling: wild-cluster"))
    if a.strata is not None and scheme != "cases":
        out.append(Problem(at + ("strata",), f"strata are honoured by cases resampling; {scheme} resampling "
                           "would ignore them", "use model_resampling: cases, or add the strata as a covariate"))
    intervals = list(a.intervals)
    explicit = "intervals" in a.model_fields_set
    if "bca" in intervals and explicit and scheme != "cases":
        out.append(Problem(at + ("intervals", intervals.index("bca")), "BCa is available for model_resampling: "
                           "cases only (its acceleration is a delete-one jackknife of rows)",
                           "use percentile, basic, normal or studentized"))
    for k, name in enumerate(a.covariates or []):
        if name in (a.outcome, a.predictor, a.groups.by if a.groups else None, a.clusters, a.strata):
            out.append(Problem(at + ("covariates", k), f"'{name}' is already the outcome, predictor, groups, "
                               "clusters or strata", "list each column in one role"))
    return out
