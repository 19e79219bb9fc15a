"""Case-mix fit: how likely each patient's outcome was, given their risk factors alone.

Binary measures use logistic regression (statsmodels GLM, binomial family, logit link).
The risk coefficients are estimated *within units* (unit indicators in the model), so a
unit that both treats sicker patients and has worse care cannot make sickness look
more dangerous than it is; this is the fixed-effects ("within") estimator of
econometrics, and it is what the methods page explains. Units whose patients all had the
same outcome carry no information about the coefficients under the conditional
likelihood (Chamberlain 1980) and are left out of this step only.

Each patient's expected risk then uses those coefficients with one network intercept
chosen so that expected events equal observed events across the network
(calibration-in-the-large).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
import patsy
import statsmodels.api as sm
from scipy.optimize import brentq
from scipy.special import expit
from scipy.stats import rankdata

from .config import MeasureSection
from .errors import FitError


@dataclass(frozen=True)
class CaseMixFit:
    """A measure's case-mix fit: coefficients, per-patient linear risk and expected risk."""

    measure: str
    formula: str
    patients: int
    events: int
    coefficients: pd.DataFrame  # index term; estimate, std_error, odds_ratio, or_lower, or_upper
    linear: np.ndarray  # b'x per patient, no intercept (the shrinkage fit's offset)
    intercept: float  # network intercept after calibration-in-the-large
    expected: np.ndarray  # expected risk per patient
    c_statistic: float
    units_in_fit: int  # units with both outcomes present (used to estimate the coefficients)
    solver: str  # "statsmodels" (dummy columns) or "block-newton" (same estimates, for many units)


def c_statistic(outcome: np.ndarray, score: np.ndarray) -> float:
    """Area under the ROC curve by the Mann-Whitney rank formula (ties count one half).

    Hanley & McNeil (1982, Radiology 143:29) show this equals the ROC area.
    """
    outcome = np.asarray(outcome).astype(bool)
    n1 = int(outcome.sum())
    n0 = len(outcome) - n1
    if n1 == 0 or n0 == 0:
        return float("nan")
    ranks = rankdata(score)
    return float((ranks[outcome].sum() - n1 * (n1 + 1) / 2) / (n1 * n0))


def calibrate_intercept(linear: np.ndarray, observed_events: float) -> float:
    """The intercept c with sum(expit(c + linear)) equal to the observed event count."""
    n = len(linear)
    if not 0 < observed_events < n:
        raise ValueError("calibration needs at least one event and one non-event")
    target = lambda c: float(expit(c + linear).sum()) - observed_events  # noqa: E731
    lo, hi = -30.0 - linear.max(), 30.0 - linear.min()
    return float(brentq(target, lo, hi, xtol=1e-12))


# Above this many cells in the dense design (patients x (risk terms + unit indicators)), the
# within-unit fit uses the block Newton solver below instead of statsmodels with dummy columns.
DENSE_LIMIT = 20_000_000


def within_logit(y: np.ndarray, x: np.ndarray, unit: np.ndarray, n_units: int, tol: float = 1e-10, max_iter: int = 100):
    """Logistic regression with one intercept per unit, by Newton's method on the block system.

    The unit intercepts form a diagonal block of the Hessian, so each Newton step solves the
    small risk-factor block through its Schur complement and then the intercepts in closed
    form: the same maximum-likelihood estimates as a fit with a dummy column per unit, in
    memory proportional to patients x risk terms. Returns (coefficients, standard errors).
    Every unit must have both outcomes (otherwise its intercept has no finite estimate).
    """
    k = x.shape[1]

    def blocks(a_: np.ndarray, b_: np.ndarray):
        """Score and Hessian blocks: g_a, residuals, h_aa (diagonal), h_ab, Schur complement of h_aa."""
        p = expit(a_[unit] + x @ b_)
        w, r = p * (1 - p), y - p
        h_aa = np.bincount(unit, weights=w, minlength=n_units)
        h_ab = np.column_stack([np.bincount(unit, weights=w * x[:, c], minlength=n_units) for c in range(k)]) if k else np.zeros((n_units, 0))
        schur = (x * w[:, None]).T @ x - h_ab.T @ (h_ab / h_aa[:, None])
        return np.bincount(unit, weights=r, minlength=n_units), r, h_aa, h_ab, schur

    def loglik(a_: np.ndarray, b_: np.ndarray) -> float:
        eta = a_[unit] + x @ b_
        return float(np.sum(y * eta - np.logaddexp(0.0, eta)))

    mean = np.bincount(unit, weights=y, minlength=n_units) / np.bincount(unit, minlength=n_units)
    a, b = np.log(mean / (1 - mean)), np.zeros(k)
    current = loglik(a, b)
    for _ in range(max_iter):
        g_a, r, h_aa, h_ab, schur = blocks(a, b)
        db = np.linalg.solve(schur, x.T @ r - h_ab.T @ (g_a / h_aa)) if k else b
        da = (g_a - h_ab @ db) / h_aa
        step = 1.0
        while step > 1e-4:  # step halving keeps every iteration uphill
            trial = loglik(a + step * da, b + step * db)
            if trial >= current - 1e-12:
                break
            step /= 2
        a, b, current = a + step * da, b + step * db, trial
        if max(np.abs(step * da).max(initial=0), np.abs(step * db).max(initial=0)) < tol:
            break
    schur = blocks(a, b)[4]
    se = np.sqrt(np.diag(np.linalg.inv(schur))) if k else np.zeros(0)
    return b, se


def design(measure: MeasureSection, rows: pd.DataFrame) -> pd.DataFrame:
    """The case-mix design matrix without its intercept column (may have no columns)."""
    try:
        matrix = patsy.dmatrix(measure.casemix, rows, return_type="dataframe", NA_action="raise")
    except patsy.PatsyError as exc:
        raise FitError(f"measure '{measure.key}': the case-mix formula '{measure.casemix}' cannot be built: {exc.message}") from None
    return matrix.drop(columns=[c for c in matrix.columns if c == "Intercept"])


def fit_casemix(measure: MeasureSection, rows: pd.DataFrame, unit_codes: np.ndarray) -> CaseMixFit:
    """Fit the logistic case-mix model of a binary measure (within-unit coefficients)."""
    y = rows[measure.outcome].to_numpy(dtype=float)
    events = int(y.sum())
    if events == 0 or events == len(y):
        word = "no patient had" if events == 0 else "every patient had"
        raise FitError(f"measure '{measure.key}': {word} the outcome '{measure.outcome}', so risks cannot be compared between units.")
    x = design(measure, rows)
    sums = np.bincount(unit_codes, weights=y)
    counts = np.bincount(unit_codes)
    informative = (sums > 0) & (sums < counts)
    keep = informative[unit_codes]
    kept_units = np.flatnonzero(informative)
    k = x.shape[1]
    solver = "statsmodels" if keep.sum() * (1 + k + len(kept_units)) <= DENSE_LIMIT else "block-newton"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # convergence problems are checked below, in words
        try:
            if solver == "statsmodels":
                dummies = (unit_codes[keep, None] == kept_units[None, 1:]).astype(float)  # first kept unit is the reference
                exog = np.column_stack([np.ones(keep.sum()), x.to_numpy()[keep], dummies])
                result = sm.GLM(y[keep], exog, family=sm.families.Binomial()).fit()
                b, se = np.asarray(result.params[1 : 1 + k]), np.asarray(result.bse[1 : 1 + k])
            else:
                dense_codes = np.searchsorted(kept_units, unit_codes[keep])
                b, se = within_logit(y[keep], x.to_numpy()[keep], dense_codes, len(kept_units))
        except (np.linalg.LinAlgError, ValueError) as exc:
            raise FitError(f"measure '{measure.key}': the case-mix fit failed ({exc}). Check for risk factors that never vary or that copy each other.") from None
    if not (np.all(np.isfinite(b)) and np.all(np.isfinite(se))) or np.any(np.abs(b) > 15):
        bad = [name for name, v, s in zip(x.columns, b, se) if not np.isfinite(v) or not np.isfinite(s) or abs(v) > 15]
        raise FitError(
            f"measure '{measure.key}': the case-mix coefficients for {', '.join(bad)} could not be estimated "
            "(a risk factor that almost perfectly predicts the outcome, or that is constant). Remove or group it."
        )
    linear = x.to_numpy() @ b if k else np.zeros(len(y))
    intercept = calibrate_intercept(linear, events)
    coefficients = pd.DataFrame(
        {"estimate": b, "std_error": se, "odds_ratio": np.exp(b), "or_lower": np.exp(b - 1.959964 * se), "or_upper": np.exp(b + 1.959964 * se)},
        index=pd.Index(x.columns, name="term"),
    )
    expected = expit(intercept + linear)
    return CaseMixFit(
        measure=measure.key,
        formula=f"{measure.outcome} ~ {measure.casemix}",
        patients=len(y),
        events=events,
        coefficients=coefficients,
        linear=linear,
        intercept=intercept,
        expected=expected,
        c_statistic=c_statistic(y, linear),
        units_in_fit=len(kept_units),
        solver=solver,
    )
