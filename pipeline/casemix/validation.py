"""How good is a case-mix model? In-sample and k-fold cross-validated checks.

Binary measures: C-statistic with the DeLong et al. (1988, Biometrics 44:837) standard error
and 95% interval, the ROC curve, calibration-in-the-large and the calibration slope (Cox 1958;
Steyerberg, *Clinical Prediction Models*, 2nd ed., ch. 15), observed and expected events by
risk group, the Brier score, the Hosmer-Lemeshow test (Hosmer & Lemeshow, *Applied Logistic
Regression*) and sensitivity, specificity and positive predictive value at a risk threshold.

Continuous measures: R-squared on the outcome's scale, mean absolute error (also as a
percentage of the mean) and the predictive ratio (predicted / observed totals) by risk group.

Cross-validation refits the within-unit coefficients on k-1 folds and predicts the held-out
fold with a network intercept set on the training folds; every metric is then computed on
the pooled held-out predictions, so overfitting shows as a gap between the two columns.
Spline knots and category levels come from all rows (patsy builds the design once), a small
leak that is stated on the model report.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
import statsmodels.api as sm
from scipy.special import logit
from scipy.stats import chi2, norm, rankdata

from pipeline.casemix.model import CaseMixFit, expected_values, network_intercept
from pipeline.casemix.solver import estimate

Z95 = float(norm.ppf(0.975))


def delong(outcome: np.ndarray, score: np.ndarray) -> tuple[float, float]:
    """ROC area and its DeLong standard error, from midrank placement values (Sun & Xu 2014)."""
    outcome = np.asarray(outcome).astype(bool)
    pos, neg = np.asarray(score)[outcome], np.asarray(score)[~outcome]
    n1, n0 = len(pos), len(neg)
    if n1 < 2 or n0 < 2:
        return float("nan"), float("nan")
    all_ranks = rankdata(np.r_[pos, neg])
    # share of non-events each event outranks (ties 1/2)
    v10 = (all_ranks[:n1] - rankdata(pos)) / n0
    v01 = 1.0 - (all_ranks[n1:] - rankdata(neg)) / n1  # share of events that outrank each non-event
    area = float(v10.mean())
    return area, float(np.sqrt(v10.var(ddof=1) / n1 + v01.var(ddof=1) / n0))


def roc_points(outcome: np.ndarray, score: np.ndarray, most: int = 200) -> pd.DataFrame:
    """False- and true-positive rates at every distinct threshold (thinned to ``most`` points)."""
    outcome = np.asarray(outcome).astype(bool)
    order = np.argsort(-np.asarray(score), kind="stable")
    s, y = np.asarray(score)[order], outcome[order]
    last = np.r_[np.flatnonzero(np.diff(s)), len(s) - 1]  # last index of each distinct score
    tpr = np.r_[0.0, np.cumsum(y)[last] / y.sum()]
    fpr = np.r_[0.0, np.cumsum(~y)[last] / (~y).sum()]
    keep = np.unique(np.linspace(0, len(tpr) - 1, min(len(tpr), most)).round().astype(int))
    return pd.DataFrame({"false_positive_rate": fpr[keep], "true_positive_rate": tpr[keep]})


def risk_groups(predicted: np.ndarray, groups: int) -> np.ndarray:
    """Group 0..g-1 by quantiles of predicted risk; a value equal to a cut point goes to the lower
    group.

    Cut points are ``np.quantile(p, k/g, method="inverted_cdf")``, as for the Hosmer-Lemeshow
    deciles-of-risk test.
    """
    cuts = np.quantile(predicted, np.arange(1, groups) / groups, method="inverted_cdf")
    return np.searchsorted(cuts, predicted, side="left")


def group_table(outcome: np.ndarray, predicted: np.ndarray, groups: int) -> pd.DataFrame:
    """Per risk group: patients, observed and expected totals and means, predicted/observed."""
    g = risk_groups(predicted, groups)
    frame = (
        pd.DataFrame({"group": g + 1, "y": outcome, "p": predicted})
        .groupby("group")
        .agg(patients=("y", "size"), observed=("y", "sum"), expected=("p", "sum"))
    )
    frame["observed_mean"] = frame["observed"] / frame["patients"]
    frame["expected_mean"] = frame["expected"] / frame["patients"]
    frame["predictive_ratio"] = frame["expected"] / frame["observed"]
    return frame.reset_index()


def hosmer_lemeshow(
    outcome: np.ndarray, predicted: np.ndarray, groups: int = 10
) -> tuple[float, int, float]:
    """Hosmer-Lemeshow C statistic over deciles of risk: (statistic, degrees of freedom,
    p-value)."""
    t = group_table(outcome, predicted, groups)
    e, o, n = t["expected"].to_numpy(), t["observed"].to_numpy(), t["patients"].to_numpy()
    statistic = float(np.sum((o - e) ** 2 / (e * (1 - e / n))))
    df = len(t) - 2
    return statistic, df, float(chi2.sf(statistic, df))


def calibration(outcome: np.ndarray, predicted: np.ndarray) -> tuple[float, float]:
    """(calibration-in-the-large, calibration slope) by logistic recalibration on logit(p)."""
    lp = logit(np.clip(predicted, 1e-12, 1 - 1e-12))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        large = (
            sm.GLM(outcome, np.ones((len(lp), 1)), family=sm.families.Binomial(), offset=lp)
            .fit()
            .params[0]
        )
        slope = (
            sm.GLM(outcome, np.column_stack([np.ones(len(lp)), lp]), family=sm.families.Binomial())
            .fit()
            .params[1]
        )
    return float(large), float(slope)


@dataclass(frozen=True)
class Metrics:
    """One column of the validation table (in-sample or cross-validated)."""

    patients: int
    values: dict[str, float]  # metric key -> value (see LABELS)
    groups: pd.DataFrame  # group_table
    roc: pd.DataFrame | None  # binary only


# Metric keys in display order, with their plain labels (binary, then continuous).
LABELS = {
    "c_statistic": "C-statistic (area under the ROC curve)",
    "c_lower": "C-statistic, lower end of 95% interval (DeLong)",
    "c_upper": "C-statistic, upper end of 95% interval (DeLong)",
    "calibration_large": "Calibration-in-the-large (0 = on target overall)",
    "calibration_slope": "Calibration slope (1 = risks neither too spread nor too bunched)",
    "brier": "Brier score (mean squared error of the risks; lower is better)",
    "hl_statistic": "Hosmer-Lemeshow statistic",
    "hl_df": "Hosmer-Lemeshow degrees of freedom",
    "hl_p": "Hosmer-Lemeshow p-value",
    "sensitivity": "Sensitivity at the risk threshold",
    "specificity": "Specificity at the risk threshold",
    "ppv": "Positive predictive value at the risk threshold",
    "r_squared": "R-squared (share of the variation explained)",
    "mae": "Mean absolute error",
    "mae_percent": "Mean absolute error as % of the mean",
}


def binary_metrics(
    outcome: np.ndarray, predicted: np.ndarray, groups: int, threshold: float
) -> Metrics:
    area, se = delong(outcome, predicted)
    large, slope = calibration(outcome, predicted)
    hl, df, p = hosmer_lemeshow(outcome, predicted, groups)
    flagged, y = predicted > threshold, outcome.astype(bool)
    values = {
        "c_statistic": area,
        "c_lower": max(0.0, area - Z95 * se),
        "c_upper": min(1.0, area + Z95 * se),
        "calibration_large": large,
        "calibration_slope": slope,
        "brier": float(np.mean((outcome - predicted) ** 2)),
        "hl_statistic": hl,
        "hl_df": float(df),
        "hl_p": p,
        "sensitivity": float((flagged & y).sum() / max(y.sum(), 1)),
        "specificity": float((~flagged & ~y).sum() / max((~y).sum(), 1)),
        "ppv": float((flagged & y).sum() / flagged.sum()) if flagged.any() else float("nan"),
    }
    return Metrics(
        len(outcome),
        values,
        group_table(outcome, predicted, groups),
        roc_points(outcome, predicted),
    )


def continuous_metrics(outcome: np.ndarray, predicted: np.ndarray, groups: int) -> Metrics:
    residual = outcome - predicted
    mae = float(np.mean(np.abs(residual)))
    values = {
        "r_squared": float(1 - np.sum(residual**2) / np.sum((outcome - outcome.mean()) ** 2)),
        "mae": mae,
        "mae_percent": 100 * mae / float(outcome.mean()),
    }
    return Metrics(len(outcome), values, group_table(outcome, predicted, groups), None)


@dataclass(frozen=True)
class Validation:
    measure: str
    binary: bool
    threshold: float
    folds: int  # 0 when there was nothing to cross-validate (expected values supplied)
    in_sample: Metrics
    cross_validated: Metrics | None


def fold_of(n: int, folds: int, seed: int) -> np.ndarray:
    """Fold number 0..k-1 per row: a seeded random split into near-equal folds."""
    return np.random.default_rng(seed).permutation(np.arange(n) % folds)


def cross_validated(
    fit: CaseMixFit, y: np.ndarray, x: np.ndarray, codes: np.ndarray, folds: int, seed: int
) -> np.ndarray:
    """Held-out expected value for every patient: coefficients and intercept from the other
    folds."""
    fold = fold_of(len(y), folds, seed)
    held_out = np.empty(len(y))
    for k in range(folds):
        train, test = fold != k, fold == k
        b = estimate(fit.family, y[train], x[train], codes[train])[0]
        intercept, smearing = network_intercept(fit.family, y[train], x[train] @ b)
        held_out[test] = expected_values(fit.family, intercept, x[test] @ b, smearing)
    return held_out


def validate(
    fit: CaseMixFit,
    binary: bool,
    y: np.ndarray,
    x: np.ndarray | None,
    codes: np.ndarray,
    folds: int,
    groups: int,
    threshold: float,
    seed: int,
) -> Validation:
    """In-sample and (for fitted models) cross-validated metrics of one case-mix fit (``codes``:
    unit of each row used)."""
    score = binary_metrics if binary else continuous_metrics
    args = (groups, threshold) if binary else (groups,)
    in_sample = score(y, fit.expected, *args)
    cv = None
    if fit.fitted and x is not None:
        cv = score(y, cross_validated(fit, y, x, codes, folds, seed), *args)
    return Validation(fit.measure, binary, threshold, folds if cv is not None else 0, in_sample, cv)
