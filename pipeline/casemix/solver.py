"""The case-mix solvers: within-unit GLMs by Newton steps over unit blocks, and least squares.

The model has one intercept per unit plus dense risk-factor coefficients; each Newton step
solves the risk factors' Schur complement, so the cost grows with patients, not with units.
"""

from __future__ import annotations

import numpy as np
import statsmodels.api as sm
from scipy.special import expit

# Above this many cells in the dense design (patients x (risk terms + unit indicators)), the
# within-unit logistic fit uses the block Newton solver below instead of statsmodels with dummy
# columns.
DENSE_LIMIT = 20_000_000


def estimate(
    family: str, y: np.ndarray, x: np.ndarray, unit_codes: np.ndarray
) -> tuple[np.ndarray, np.ndarray, float, int, str]:
    """Within-unit coefficients: (b, se, dispersion, units used, solver)."""
    k = x.shape[1]
    if family == "lognormal":
        units = np.unique(unit_codes)
        b, se, sigma2 = within_ols(np.log(y), x, np.searchsorted(units, unit_codes), len(units))
        return b, se, sigma2, len(units), "within-ols"
    if family == "gamma":
        units = np.unique(unit_codes)
        b, se, phi = within_glm(y, x, np.searchsorted(units, unit_codes), len(units), "gamma")
        return b, se, phi, len(units), "block-newton"
    sums = np.bincount(unit_codes, weights=y)
    counts = np.bincount(unit_codes)
    informative = (sums > 0) & (sums < counts)
    keep = informative[unit_codes]
    kept_units = np.flatnonzero(informative)
    if keep.sum() * (1 + k + len(kept_units)) <= DENSE_LIMIT:
        # first kept unit is the reference
        dummies = (unit_codes[keep, None] == kept_units[None, 1:]).astype(float)
        exog = np.column_stack([np.ones(keep.sum()), x[keep], dummies])
        result = sm.GLM(y[keep], exog, family=sm.families.Binomial()).fit()
        return (
            np.asarray(result.params[1 : 1 + k]),
            np.asarray(result.bse[1 : 1 + k]),
            1.0,
            len(kept_units),
            "statsmodels",
        )
    b, se, _ = within_glm(
        y[keep], x[keep], np.searchsorted(kept_units, unit_codes[keep]), len(kept_units), "logistic"
    )
    return b, se, 1.0, len(kept_units), "block-newton"


def within_glm(
    y: np.ndarray,
    x: np.ndarray,
    unit: np.ndarray,
    n_units: int,
    family: str = "logistic",
    tol: float = 1e-10,
    max_iter: int = 100,
):
    """A GLM with one intercept per unit, by Newton's method (Fisher scoring) on the block system.

    Logistic (logit link) or Gamma (log link). The unit intercepts form a diagonal block of the
    information matrix, so each step solves the small risk-factor block through its Schur
    complement and then the intercepts in closed form: the same maximum-likelihood estimates as
    a fit with a dummy column per unit, in memory proportional to patients x risk terms.
    Returns (coefficients, standard errors, dispersion); Gamma standard errors use the Pearson
    dispersion, as statsmodels does. For the logistic family every unit must have both outcomes.
    """
    k = x.shape[1]
    logistic = family == "logistic"

    counts = np.bincount(unit, minlength=n_units)
    mean = np.bincount(unit, weights=y, minlength=n_units) / counts
    a, b = (np.log(mean / (1 - mean)) if logistic else np.log(mean)), np.zeros(k)
    current = _loglik(y, x, unit, logistic, a, b)
    for _ in range(max_iter):
        g_a, r, h_aa, h_ab, schur = _blocks(y, x, unit, n_units, logistic, a, b)
        db = np.linalg.solve(schur, x.T @ r - h_ab.T @ (g_a / h_aa)) if k else b
        da = (g_a - h_ab @ db) / h_aa
        step = 1.0
        while step > 1e-4:  # step halving keeps every iteration uphill
            trial = _loglik(y, x, unit, logistic, a + step * da, b + step * db)
            if trial >= current - 1e-12:
                break
            step /= 2
        a, b, current = a + step * da, b + step * db, trial
        if max(np.abs(step * da).max(initial=0), np.abs(step * db).max(initial=0)) < tol:
            break
    _, r, _, _, schur = _blocks(y, x, unit, n_units, logistic, a, b)
    dispersion = 1.0 if logistic else float(np.sum(r**2) / max(len(y) - k - n_units, 1))
    se = np.sqrt(np.diag(np.linalg.inv(schur)) * dispersion) if k else np.zeros(0)
    return b, se, dispersion


def _blocks(
    y: np.ndarray,
    x: np.ndarray,
    unit: np.ndarray,
    n_units: int,
    logistic: bool,
    a_: np.ndarray,
    b_: np.ndarray,
):
    """Score and information blocks at intercepts ``a_`` and coefficients ``b_``: g_a, residuals,
    h_aa (diagonal), h_ab, Schur complement of h_aa."""
    k = x.shape[1]
    eta = a_[unit] + x @ b_
    if logistic:
        p = expit(eta)
        w, r = p * (1 - p), y - p
    else:  # Gamma, log link: score (y - m)/m per unit of eta, Fisher weight 1
        w, r = np.ones_like(y), y * np.exp(-eta) - 1.0
    h_aa = np.bincount(unit, weights=w, minlength=n_units)
    h_ab = (
        np.column_stack(
            [np.bincount(unit, weights=w * x[:, c], minlength=n_units) for c in range(k)]
        )
        if k
        else np.zeros((n_units, 0))
    )
    schur = (x * w[:, None]).T @ x - h_ab.T @ (h_ab / h_aa[:, None])
    return np.bincount(unit, weights=r, minlength=n_units), r, h_aa, h_ab, schur


def _loglik(
    y: np.ndarray, x: np.ndarray, unit: np.ndarray, logistic: bool, a_: np.ndarray, b_: np.ndarray
) -> float:
    """Log-likelihood (up to a constant) of the logistic or Gamma (unit shape) model."""
    eta = a_[unit] + x @ b_
    if logistic:
        return float(np.sum(y * eta - np.logaddexp(0.0, eta)))
    return float(-np.sum(y * np.exp(-eta) + eta))


def within_ols(y: np.ndarray, x: np.ndarray, unit: np.ndarray, n_units: int):
    """Least squares with one intercept per unit (demeaning within units): (b, se, residual
    variance)."""
    counts = np.bincount(unit, minlength=n_units)
    demean = lambda v: v - (np.bincount(unit, weights=v, minlength=n_units) / counts)[unit]  # noqa: E731
    yd = demean(y)
    xd = (
        np.column_stack([demean(x[:, c]) for c in range(x.shape[1])])
        if x.shape[1]
        else np.zeros((len(y), 0))
    )
    b = np.linalg.solve(xd.T @ xd, xd.T @ yd) if x.shape[1] else np.zeros(0)
    resid = yd - xd @ b
    sigma2 = float(resid @ resid / max(len(y) - x.shape[1] - n_units, 1))
    se = np.sqrt(np.diag(np.linalg.inv(xd.T @ xd)) * sigma2) if x.shape[1] else np.zeros(0)
    return b, se, sigma2
