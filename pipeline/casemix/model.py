"""Case-mix fit: each patient's expected outcome, given their risk factors alone.

Binary measures use logistic regression; continuous measures (length of stay, cost) a Gamma
GLM with log link or a log-normal model (least squares on the log scale) with Duan's (1983,
JASA 78:605) smearing retransformation. The risk coefficients are estimated *within units*
(one intercept per unit), so a unit that both treats sicker patients and has worse care
cannot make sickness look more dangerous than it is; this is the fixed-effects ("within")
estimator. Units whose patients all had the same binary outcome carry no information about
the coefficients under the conditional likelihood (Chamberlain 1980) and are left out of
that step only.

Each patient's expected value then uses those coefficients with one network intercept:
for logistic and Gamma fits chosen so that expected totals equal observed totals across the
network (calibration-in-the-large); for the log-normal fit the mean log residual, then the
smearing factor.

Before fitting, the design is checked and problems are explained in words: missing values
(by the measure's policy, every dropped or filled row counted), categories with no patients,
risk factors that never vary, perfect separation and exact or near collinearity.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import patsy
from scipy.optimize import brentq
from scipy.special import expit
from scipy.special import logit as _logit
from scipy.stats import rankdata

from pipeline.casemix.solver import estimate
from pipeline.config import MeasureSection, family_of
from pipeline.errors import FitError
from pipeline.families import FAMILIES as FAMILY_TABLE
from pipeline.formulas import formula_variables


def logit(p):
    """log(p / (1 - p)), for formulas that use a risk supplied from elsewhere as a covariate."""
    return _logit(np.asarray(p, dtype=float))


@dataclass(frozen=True)
class CaseMixFit:
    """A measure's case-mix fit: coefficients, per-patient linear predictor and expected value."""

    measure: str
    formula: str
    # logistic, gamma, lognormal; "supplied" or "unit summary" when nothing was fitted here
    family: str
    patients: int
    events: float  # binary: patients with the outcome; continuous: the outcome's total
    # index term; estimate, std_error, ratio, lower, upper (ratio = odds ratio or mean ratio)
    coefficients: pd.DataFrame
    # b'x per patient, no intercept (with the intercept: the shrinkage fit's offset)
    linear: np.ndarray
    intercept: float  # network intercept
    expected: np.ndarray  # expected value per patient (risk, or mean on the outcome's scale)
    c_statistic: float  # binary only (nan otherwise)
    units_in_fit: int  # units used to estimate the coefficients
    solver: str  # statsmodels, block-newton, within-ols, none
    used: np.ndarray  # boolean mask over the cohort rows: the patients of this measure
    smearing: float = 1.0  # Duan's factor (log-normal); 1 otherwise
    # Gamma: Pearson dispersion; log-normal: residual variance on the log scale
    dispersion: float = 1.0
    # {"dropped": {var: n}, "imputed": {var: n}, "dropped_rows": n, "by_unit": {code: n}}
    exclusions: dict = field(default_factory=dict)
    warnings: tuple[str, ...] = ()

    @property
    def fitted(self) -> bool:
        return self.family in FAMILIES


# Built-in case-mix families: name -> (what is fitted, what the ratio means), from families.py.
FAMILIES = {f.name: (f.model_words, f.ratio_word) for f in FAMILY_TABLE.values()}


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


def prepare(
    measure: MeasureSection, rows: pd.DataFrame, variables: list[str], unit_codes: np.ndarray
) -> tuple[pd.DataFrame, np.ndarray, dict]:
    """Apply the measure's missing-value policy: (rows to fit, mask of rows used, counts of what was
    done)."""
    frame = rows[[measure.outcome, *variables]]
    missing = frame[variables].isna()
    counts: dict[str, Any] = {
        "policy": measure.missing,
        "dropped": {},
        "imputed": {},
        "dropped_rows": 0,
        "imputed_rows": 0,
        "by_unit": {},
    }
    used = np.ones(len(rows), dtype=bool)
    if not missing.to_numpy().any():
        return frame, used, counts
    if measure.missing == "drop":
        used = ~missing.any(axis=1).to_numpy()
        counts["dropped"] = {v: int(n) for v, n in missing.sum().items() if n}
        counts["dropped_rows"] = int((~used).sum())
        counts["by_unit"] = {
            int(c): int(n)
            for c, n in zip(*np.unique(unit_codes[~used], return_counts=True), strict=True)
        }
        return frame[used], used, counts
    if measure.missing == "impute":
        frame = frame.copy()
        for v in variables:
            gaps = missing[v]
            if not gaps.any():
                continue
            column = frame[v]
            numeric = pd.api.types.is_numeric_dtype(column)
            fill = column.median() if numeric else column.mode().iloc[0]
            frame[v] = column.fillna(fill)
            counts["imputed"][v] = int(gaps.sum())
        counts["imputed_rows"] = int(missing.any(axis=1).sum())
        return frame, used, counts
    # data checks catch this first
    raise FitError(
        f"measure '{measure.key}': risk factors have missing values and missing = \"stop\"."
    )


def design(measure: MeasureSection, rows: pd.DataFrame, casemix: str | None = None) -> pd.DataFrame:
    """The case-mix design matrix without its intercept column (may have no columns)."""
    formula = measure.casemix if casemix is None else casemix
    try:
        matrix = patsy.dmatrix(formula, rows, return_type="dataframe", NA_action="raise")
    except patsy.PatsyError as exc:
        raise FitError(
            f"measure '{measure.key}': the case-mix formula '{formula}' cannot be built: "
            f"{exc.message}"
        ) from None
    return matrix.drop(columns=[c for c in matrix.columns if c == "Intercept"])


def check_design(
    measure: MeasureSection, x: pd.DataFrame, y: np.ndarray, binary: bool
) -> list[str]:
    """Explain, in words, what would make the fit fail or mislead. Raises for fatal problems;
    returns warnings."""
    values = x.to_numpy()
    problems: list[str] = []
    spread = np.ptp(values, axis=0) if len(values) else np.zeros(x.shape[1])
    for name, col, width in zip(x.columns, values.T, spread, strict=True):
        if not np.any(col):
            problems.append(
                f"'{name}' has no patients (an empty category): merge it with a neighbouring "
                "category or drop it"
            )
        elif width == 0:
            problems.append(
                f"'{name}' is the same for every patient, so its effect cannot be estimated: "
                "remove it from the formula"
            )
        elif binary and np.isin(col, (0.0, 1.0)).all():
            n, events = col.sum(), y[col == 1].sum()
            if events == 0 or events == n:
                who = "none" if events == 0 else "all"
                problems.append(
                    f"{who} of the {n:,.0f} patients with '{name}' had the outcome (perfect "
                    "separation), so its odds ratio "
                    "would be infinite: merge that category with a neighbour or drop the term"
                )
    if not problems and x.shape[1] > 1:
        # a systematic sample is plenty for rank and correlation
        sample = values[:: max(1, len(values) // 200_000)]
        centred = (sample - sample.mean(axis=0)) / sample.std(axis=0)
        _, singular, vt = np.linalg.svd(centred / np.sqrt(len(centred)), full_matrices=False)
        if singular[-1] < 1e-6 * singular[0]:
            involved = [x.columns[j] for j in np.flatnonzero(np.abs(vt[-1]) > 0.05)]
            problems.append(
                f"the terms {', '.join(repr(t) for t in involved)} carry the same information "
                "(one is an exact combination of "
                "the others), so their separate effects cannot be estimated: remove one of them"
            )
    if problems:
        raise FitError(
            f"measure '{measure.key}': the case-mix model cannot be fitted as written: "
            + "; ".join(problems)
            + "."
        )
    notes = []
    if x.shape[1] > 1:
        corr = np.corrcoef(centred, rowvar=False)
        for i, j in zip(*np.triu_indices(x.shape[1], 1), strict=True):
            if abs(corr[i, j]) > 0.98 and x.columns[i].split("[")[0] != x.columns[j].split("[")[0]:
                notes.append(
                    f"measure '{measure.key}': risk factors '{x.columns[i]}' and "
                    f"'{x.columns[j]}' are almost the same "
                    f"(correlation {corr[i, j]:.3f}); the expected values are fine, but their "
                    "separate coefficients are unstable and should not be read alone."
                )
    return notes


def network_intercept(family: str, y: np.ndarray, linear: np.ndarray) -> tuple[float, float]:
    """(intercept, smearing factor) that put the expected values on the outcome's scale."""
    if family == "logistic":
        return calibrate_intercept(linear, float(y.sum())), 1.0
    if family == "gamma":  # calibration-in-the-large: sum of exp(c + linear) equals sum of y
        return float(np.log(y.sum()) - np.log(np.exp(linear).sum())), 1.0
    residual = np.log(y) - linear
    c = float(residual.mean())
    # Duan (1983): mean of the exponentiated residuals
    return c, float(np.mean(np.exp(residual - c)))


def expected_values(
    family: str, intercept: float, linear: np.ndarray, smearing: float = 1.0
) -> np.ndarray:
    if family == "logistic":
        return expit(intercept + linear)
    return np.exp(intercept + linear) * smearing


def fit_casemix(
    measure: MeasureSection, rows: pd.DataFrame, unit_codes: np.ndarray, casemix: str | None = None
) -> CaseMixFit:
    """Fit the measure's case-mix model (within-unit coefficients) and each patient's expected
    value."""
    return fit_with_design(measure, rows, unit_codes, casemix)[0]


def fit_with_design(
    measure: MeasureSection, rows: pd.DataFrame, unit_codes: np.ndarray, casemix: str | None = None
) -> tuple[CaseMixFit, np.ndarray | None, np.ndarray]:
    """:func:`fit_casemix`, also returning the design matrix (None when nothing was fitted) and the
    outcome of the rows used."""
    if measure.expected_column:
        fit = supplied_casemix(measure, rows, unit_codes)
        return fit, None, rows[measure.outcome].to_numpy(dtype=float)
    family = family_of(measure)
    binary = family == "logistic"
    formula = measure.casemix if casemix is None else casemix
    frame, used, exclusions = prepare(measure, rows, formula_variables(formula), unit_codes)
    codes = unit_codes[used]
    y = frame[measure.outcome].to_numpy(dtype=float)
    if binary and (y.sum() == 0 or y.sum() == len(y)):
        word = "no patient had" if y.sum() == 0 else "every patient had"
        raise FitError(
            f"measure '{measure.key}': {word} the outcome '{measure.outcome}', so risks cannot "
            "be compared between units."
        )
    x = design(measure, frame, formula)
    notes = check_design(measure, x, y, binary)
    b, se, dispersion, units_in_fit, solver = _estimate_checked(measure, family, y, x, codes)
    linear = x.to_numpy() @ b if x.shape[1] else np.zeros(len(y))
    intercept, smearing = network_intercept(family, y, linear)
    fit = CaseMixFit(
        measure=measure.key,
        formula=f"{measure.outcome} ~ {formula}",
        family=family,
        patients=len(y),
        events=float(y.sum()),
        coefficients=coefficient_table(x.columns, b, se),
        linear=linear,
        intercept=intercept,
        expected=expected_values(family, intercept, linear, smearing),
        c_statistic=c_statistic(y, linear) if binary else float("nan"),
        units_in_fit=units_in_fit,
        solver=solver,
        used=used,
        smearing=smearing,
        dispersion=dispersion,
        exclusions=exclusions,
        warnings=tuple(notes),
    )
    return fit, x.to_numpy(), y


def _estimate_checked(
    measure: MeasureSection, family: str, y: np.ndarray, x: pd.DataFrame, codes: np.ndarray
) -> tuple[np.ndarray, np.ndarray, float, int, str]:
    """:func:`~pipeline.casemix.solver.estimate`, with a failed or degenerate fit explained."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # convergence problems are checked below, in words
        try:
            b, se, dispersion, units_in_fit, solver = estimate(family, y, x.to_numpy(), codes)
        except (np.linalg.LinAlgError, ValueError) as exc:
            raise FitError(
                f"measure '{measure.key}': the case-mix fit failed ({exc}). Check for risk "
                "factors that never vary or that copy each other."
            ) from None
    if not (np.all(np.isfinite(b)) and np.all(np.isfinite(se))) or np.any(np.abs(b) > 15):
        bad = [
            name
            for name, v, s in zip(x.columns, b, se, strict=True)
            if not np.isfinite(v) or not np.isfinite(s) or abs(v) > 15
        ]
        raise FitError(
            f"measure '{measure.key}': the case-mix coefficients for {', '.join(bad)} could "
            "not be estimated "
            "(a risk factor that almost perfectly predicts the outcome, or that is constant). "
            "Remove or group it."
        )
    return b, se, dispersion, units_in_fit, solver


def coefficient_table(terms, b: np.ndarray, se: np.ndarray) -> pd.DataFrame:
    """Estimates with Wald 95% intervals, also as ratios (odds ratios or ratios of means)."""
    return pd.DataFrame(
        {
            "estimate": b,
            "std_error": se,
            "ratio": np.exp(b),
            "lower": np.exp(b - 1.959964 * se),
            "upper": np.exp(b + 1.959964 * se),
        },
        index=pd.Index(list(terms), name="term"),
    )


def supplied_casemix(
    measure: MeasureSection, rows: pd.DataFrame, unit_codes: np.ndarray
) -> CaseMixFit:
    """Expected values supplied per patient (a risk model fitted elsewhere): used as they are."""
    y = rows[measure.outcome].to_numpy(dtype=float)
    expected = rows[measure.expected_column].to_numpy(dtype=float)
    binary = measure.type == "binary"
    linear = _logit(expected) if binary else np.log(expected)
    return CaseMixFit(
        measure=measure.key,
        formula=f"expected value supplied in column '{measure.expected_column}'",
        family="supplied",
        patients=len(y),
        events=float(y.sum()),
        coefficients=coefficient_table([], np.zeros(0), np.zeros(0)),
        linear=linear,
        intercept=0.0,
        expected=expected,
        c_statistic=c_statistic(y, linear) if binary else float("nan"),
        units_in_fit=len(np.unique(unit_codes)),
        solver="none",
        used=np.ones(len(y), dtype=bool),
        exclusions={
            "policy": measure.missing,
            "dropped": {},
            "imputed": {},
            "dropped_rows": 0,
            "imputed_rows": 0,
            "by_unit": {},
        },
    )


def unit_summary_fit(measure: MeasureSection, summary: pd.DataFrame) -> CaseMixFit:
    """Stands in for a case-mix fit when expected events per unit were supplied (unit-level
    input)."""
    return CaseMixFit(
        measure=measure.key,
        formula=f"expected events per unit supplied in {measure.summary}",
        family="unit summary",
        patients=int(summary["cases"].sum()),
        events=float(summary["observed"].sum()),
        coefficients=coefficient_table([], np.zeros(0), np.zeros(0)),
        linear=np.zeros(0),
        intercept=0.0,
        expected=summary["expected"].to_numpy(float),
        c_statistic=float("nan"),
        units_in_fit=0,
        solver="none",
        used=np.zeros(0, dtype=bool),
    )
