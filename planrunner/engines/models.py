"""Regression fits behind the model statistics: least squares and logistic regression (pure numpy).

A model statistic reads one coefficient of a fitted model, or averages the model's predictions
(g-computation). Its design matrix is ``X = [1, target, covariates...]``: the intercept, then the
target column (the 0/1 indicator of the first compared group, or the named predictor), then the
covariates (numbers as they are, categories as 0/1 indicators of every level but the first).

Formulas (n rows, p columns, e = y − Xβ̂, A = (XᵀX)⁻¹Xᵀ so that β̂ = Ay):

* least squares: β̂ = (XᵀX)⁻¹Xᵀy by a QR decomposition of X (never the normal equations);
* classical covariance s²(XᵀX)⁻¹ with s² = eᵀe/(n − p);
* heteroskedasticity-robust (White 1980): HC0 = (XᵀX)⁻¹ Xᵀdiag(e²)X (XᵀX)⁻¹, HC1 = HC0·n/(n − p);
* cluster-robust (Liang & Zeger 1986): (XᵀX)⁻¹ (Σ_g X_gᵀe_g e_gᵀX_g) (XᵀX)⁻¹ · G/(G − 1)·(n − 1)/(n − p),
  the small-sample factor statsmodels applies for cov_type='cluster';
* logistic regression: maximum likelihood by Newton–Raphson, μ = 1/(1 + e^(−Xβ)); robust covariance
  H⁻¹(Σ s_i s_iᵀ)H⁻¹ with H = XᵀWX, W = diag(μ(1 − μ)), s_i = x_i(y_i − μ_i) (HC1 and cluster with the
  factors above);
* g-computation (standardisation): p₁ = mean over all rows of μ(x_i with target = 1), p₀ likewise with
  target = 0; risk difference p₁ − p₀, risk ratio p₁/p₀, odds ratio [p₁/(1 − p₁)]/[p₀/(1 − p₀)];
* its standard error (studentized intervals): the delta method on the sandwich of the stacked estimating
  equations of (β, p₁, p₀), var = Σ_i (ψ_cov,i + ψ_β,i)² (`standardized_influence`), with the HC1 or
  cluster factor above.

Checks (each a refusal with a message naming the column, before any resampling):

* rank: every column but the intercept is centred and scaled to unit length (so shifting or scaling
  a column never changes the verdict), and a column whose part not explained by the columns before
  it (|R_jj| of a QR decomposition) is below ``RANK_TOLERANCE`` is constant or collinear;
* separation: a logistic fit whose fitted probabilities reach 0 or 1 (within ``SEPARATION_EPS``) or
  whose Newton steps do not converge is refused; a huge coefficient is never reported.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from planrunner.errors import EngineError

__all__ = ["Design", "Fit", "RANK_TOLERANCE", "check_rank", "fit_logistic", "fit_ols", "robust_covariance",
           "solve_each", "standardized_influence"]

RANK_TOLERANCE = 1e-8
"""A centred, unit-length column whose residual length after the earlier columns is below this is
taken as a combination of them (its correlation with them exceeds 1 − 5e-17 in effect)."""

SEPARATION_EPS = 1e-8  # a fitted probability this close to 0 or 1 marks separation
NEWTON_LIMIT = 50  # Newton steps allowed for the full-data logistic fit
NEWTON_TOLERANCE = 1e-12  # relative change of the coefficients at convergence

LINEAR = ("adjusted_mean_difference", "coefficient")
STANDARDIZED = ("standardized_risk_difference", "standardized_risk_ratio", "standardized_odds_ratio")


@dataclass(frozen=True, eq=False)
class Design:
    """The arrays of one model: outcome, design matrix, and the units resampling respects."""

    y: np.ndarray  # (n,)
    x: np.ndarray  # (n, p): intercept, target, covariates
    names: tuple[str, ...]  # one per column of x
    cells: np.ndarray  # (n,) codes of the cells cases are resampled within (group × stratum)
    clusters: np.ndarray | None  # (n,) cluster codes 0..G-1, or None
    lines: np.ndarray | None = None  # file line of each row, for messages
    target: int = 1

    @property
    def n(self) -> int:
        return int(self.y.shape[0])

    @property
    def p(self) -> int:
        return int(self.x.shape[1])


@dataclass(frozen=True, eq=False)
class Fit:
    """A fitted model: coefficients, residuals (y − fitted) and the inverse of the information."""

    beta: np.ndarray
    residuals: np.ndarray  # y − Xβ̂ (least squares) or y − μ̂ (logistic)
    bread: np.ndarray  # (XᵀX)⁻¹, or (XᵀWX)⁻¹ for logistic regression
    fitted: np.ndarray


def check_rank(design: Design, what: str) -> None:
    """Refuse a constant column or one collinear with the columns before it (see module doc)."""
    x = design.x[:, 1:]
    centred = x - x.mean(axis=0)
    scale = np.max(np.abs(x), axis=0) * math.sqrt(design.n)
    length = np.linalg.norm(centred, axis=0)
    for constant in np.flatnonzero(length <= 1e-12 * np.maximum(scale, np.finfo(float).tiny)):
        raise EngineError(f"{_column_words(design.names[int(constant) + 1])} is constant on the rows used",
                          hint="remove it from covariates (it is absorbed by the intercept)")
    unit = centred / length
    r = np.asarray(np.linalg.qr(unit, mode="r"))
    for j in range(unit.shape[1]):
        if abs(r[j, j]) < RANK_TOLERANCE:
            before = [design.names[k + 1] for k in range(j)]
            raise EngineError(f"{_column_words(design.names[j + 1])} is collinear with "
                              f"{', '.join(before)} (a linear combination of them on the rows used; "
                              f"rank tolerance {RANK_TOLERANCE:g} after centring and scaling)",
                              hint="remove it, or a covariate it repeats, from covariates")


def _column_words(name: str) -> str:
    return f"column '{name}'"


def fit_ols(x: np.ndarray, y: np.ndarray) -> Fit:
    """Least squares by QR: β̂ = R⁻¹Qᵀy, (XᵀX)⁻¹ = R⁻¹R⁻ᵀ."""
    q, r = np.linalg.qr(x)
    beta = np.linalg.solve(r, q.T @ y)
    r_inv = np.linalg.solve(r, np.eye(r.shape[0]))
    fitted = x @ beta
    return Fit(beta, y - fitted, r_inv @ r_inv.T, fitted)


def expit(eta: np.ndarray) -> np.ndarray:
    """1/(1 + e^(−η)) without overflow for large |η|."""
    out = np.empty_like(eta, dtype=np.float64)
    positive = eta >= 0
    out[positive] = 1.0 / (1.0 + np.exp(-eta[positive]))
    e = np.exp(eta[~positive])
    out[~positive] = e / (1.0 + e)
    return out


def fit_logistic(x: np.ndarray, y: np.ndarray, what: str, names: Sequence[str] = ()) -> Fit:
    """Maximum likelihood by Newton–Raphson from β = 0; separation is refused (module doc)."""
    beta = np.zeros(x.shape[1])
    converged = False
    for _ in range(NEWTON_LIMIT):
        mu = expit(x @ beta)
        w = mu * (1.0 - mu)
        hessian = x.T @ (x * w[:, None])
        try:
            step = np.linalg.solve(hessian, x.T @ (y - mu))
        except np.linalg.LinAlgError:
            break
        beta = beta + step
        if np.max(np.abs(step)) <= NEWTON_TOLERANCE * max(1.0, float(np.max(np.abs(beta)))):
            converged = True
            break
    mu = expit(x @ beta)
    extreme = (mu < SEPARATION_EPS) | (mu > 1.0 - SEPARATION_EPS)
    if not converged or extreme.any() or not np.all(np.isfinite(beta)):
        count = int(extreme.sum())
        raise EngineError("the logistic regression shows separation: "
                          + (f"{count} row(s) are predicted with probability 0 or 1 (the outcome is perfectly "
                             "predicted there), " if count else "")
                          + ("its maximum-likelihood estimate does not exist (a coefficient grows without bound)"
                             if count or not converged else "the fit is not finite"),
                          hint="a group or covariate level in which every outcome is the same cannot be "
                               "adjusted for; merge sparse covariate levels or remove the covariate")
    w = mu * (1.0 - mu)
    bread = np.linalg.inv(x.T @ (x * w[:, None]))
    return Fit(beta, y - mu, bread, mu)


def robust_covariance(x: np.ndarray, fit: Fit, kind: str, clusters: np.ndarray | None = None) -> np.ndarray:
    """HC0, HC1 or cluster-robust covariance of the coefficients (module doc); the score of row i
    is x_i·residual_i for both models."""
    n, p = x.shape
    scores = x * fit.residuals[:, None]
    if kind == "cluster":
        assert clusters is not None
        groups = int(clusters.max()) + 1
        summed = np.zeros((groups, p))
        np.add.at(summed, clusters, scores)
        meat = summed.T @ summed
        factor = groups / (groups - 1) * (n - 1) / (n - p)
    else:
        meat = scores.T @ scores
        factor = n / (n - p) if kind == "HC1" else 1.0
    return factor * fit.bread @ meat @ fit.bread


def standardized(beta: np.ndarray, x: np.ndarray, target: int, weights: np.ndarray | None = None,
                 ) -> tuple[np.ndarray, np.ndarray]:
    """p₁ and p₀ of g-computation for one or a batch of coefficient vectors (``beta`` (…, p));
    ``weights`` (…, n) are each row's share of the average (None: 1/n each)."""
    x1 = x.copy()
    x1[:, target] = 1.0
    x0 = x.copy()
    x0[:, target] = 0.0
    p1 = expit(np.asarray(beta @ x1.T))
    p0 = expit(np.asarray(beta @ x0.T))
    if weights is None:
        return p1.mean(axis=-1), p0.mean(axis=-1)
    return np.sum(p1 * weights, axis=-1), np.sum(p0 * weights, axis=-1)


def effect(name: str, p1: np.ndarray, p0: np.ndarray) -> np.ndarray:
    """The standardised effect from the two average risks."""
    with np.errstate(divide="ignore", invalid="ignore"):
        if name == "standardized_risk_difference":
            return p1 - p0
        if name == "standardized_risk_ratio":
            return p1 / p0
        return (p1 / (1.0 - p1)) / (p0 / (1.0 - p0))


def effect_gradient(name: str, p1: np.ndarray, p0: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """∂θ/∂p₁ and ∂θ/∂p₀ of the standardised effect: difference (1, −1); ratio (1/p₀, −p₁/p₀²);
    odds ratio (θ/(p₁(1 − p₁)), −θ/(p₀(1 − p₀)))."""
    with np.errstate(divide="ignore", invalid="ignore"):
        if name == "standardized_risk_difference":
            return np.ones_like(p1), -np.ones_like(p0)
        if name == "standardized_risk_ratio":
            return 1.0 / p0, -p1 / (p0 * p0)
        theta = effect(name, p1, p0)
        return theta / (p1 * (1.0 - p1)), -theta / (p0 * (1.0 - p0))


def standardized_influence(name: str, beta: np.ndarray, x: np.ndarray, y: np.ndarray, target: int,
                           counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each row's share of a standardised effect's error, for a batch of R fits (``beta`` (R, p)) on
    rows counted ``counts`` (R, n) times (the data: one row of ones): (ψ_cov, ψ_β), both (R, n).

    With N = Σc, wᵢ = cᵢ/N, μᵈᵢ = μ(xᵢ with target = d), p_d = Σ wᵢμᵈᵢ and g = ∂θ/∂β =
    f₁ Σ wᵢμ¹ᵢ(1 − μ¹ᵢ)x¹ᵢ + f₀ Σ wᵢμ⁰ᵢ(1 − μ⁰ᵢ)x⁰ᵢ (f_d of `effect_gradient`):
    ψ_cov,i = [f₁(μ¹ᵢ − p₁) + f₀(μ⁰ᵢ − p₀)]/N, the averaging over the rows' covariates, and
    ψ_β,i = gᵀ(XᵀCWX)⁻¹xᵢ(yᵢ − μᵢ), the coefficients' error (delta method on the sandwich). The
    sandwich variance of the stacked estimating equations (β, p₁, p₀) is Σ cᵢ(ψ_cov,i + ψ_β,i)²
    (HC0); Σ cᵢψ²_β,i alone is the delta method on the HC0 covariance of β̂, which statsmodels'
    marginal effects use."""
    x1 = x.copy()
    x1[:, target] = 1.0
    x0 = x.copy()
    x0[:, target] = 0.0
    total = counts.sum(axis=1, keepdims=True)
    w = counts / total
    mu1, mu0, mu = expit(beta @ x1.T), expit(beta @ x0.T), expit(beta @ x.T)
    p1, p0 = np.sum(w * mu1, axis=1), np.sum(w * mu0, axis=1)
    f1, f0 = effect_gradient(name, p1, p0)
    g = f1[:, None] * ((w * mu1 * (1.0 - mu1)) @ x1) + f0[:, None] * ((w * mu0 * (1.0 - mu0)) @ x0)
    k = x.shape[1]
    outer = (x[:, :, None] * x[:, None, :]).reshape(x.shape[0], k * k)
    hessian = ((counts * mu * (1.0 - mu)) @ outer).reshape(-1, k, k)
    direction = solve_each(hessian, g)  # (XᵀCWX)⁻¹g, one per fit
    psi_cov = (f1[:, None] * (mu1 - p1[:, None]) + f0[:, None] * (mu0 - p0[:, None])) / total
    psi_beta = (direction @ x.T) * (y[None, :] - mu)
    return psi_cov, psi_beta


def solve_each(matrices: np.ndarray, vectors: np.ndarray) -> np.ndarray:
    """Solve each system (``matrices`` (R, p, p), ``vectors`` (R, p)); a singular one (a resample that
    lost a covariate level) gives NaN."""
    try:
        return np.linalg.solve(matrices, vectors[:, :, None])[:, :, 0]
    except np.linalg.LinAlgError:
        out = np.full(vectors.shape, np.nan)
        for i in range(matrices.shape[0]):  # only a chunk that holds a singular system
            try:
                out[i] = np.linalg.solve(matrices[i], vectors[i])
            except np.linalg.LinAlgError:
                pass
        return out
