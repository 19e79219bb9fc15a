"""The benchmark: one definition that every published number of a measure is measured against.

fairgauge compares each unit with what its own patients would be expected to have at the
benchmark's performance: indirect standardisation. For every measure,

* the reference level R is the network's observed rate (or mean), or a fixed rate from
  ``[reporting].benchmark`` for binary measures;
* a unit's **expected** total E_i is the sum, over its own patients, of their expected outcome
  under the case-mix model, with the one network intercept set so that the expected total of the
  whole network is R times its patients (calibration-in-the-large). Expected values supplied
  from elsewhere (a risk column or unit totals) are brought to the same total: risks by a shift
  on the logit scale, unit totals by one common factor;
* the published **O/E** is observed / E_i, and the **ratio** of the shrinkage fit is the unit's
  predicted total P_i (its own posterior intercept applied to the same patients) over the same
  E_i, draw by draw. Its benchmark is 1, so "in line with the benchmark" means P_i near E_i;
* the **adjusted rate** (or mean) is ratio x R, so the benchmark line sits at R, and P(above),
  P(below), groups, ranks, the funnel's centre and the unit strips all use the same R and E_i.

This is the ratio of predicted to expected outcomes (Krumholz et al. 2006, Circulation 113:1683,
from memory) with the expected total taken at the network's own level, as in indirectly
standardised ratios and their funnel plots (Spiegelhalter 2005, Statistics in Medicine 24:1185,
section 3.3; from memory). A unit whose observed count equals its expected count, and whose
estimate rests mostly on its own patients, therefore has a ratio near 1.

What small units are pulled towards is a different value: the typical unit of the hierarchical
model (its mean intercept mu), which need not equal R when large and small units differ. It is
reported per measure as the typical unit's ratio (``MeasureResult.typical``) and shown on the
measure page when it differs from the benchmark.
"""

from __future__ import annotations

import numpy as np
from scipy.special import expit

from pipeline.casemix.model import CaseMixFit, calibrate_intercept
from pipeline.config import MeasureSection, family_of


def reference_rate(fixed: str | float, measure_type: str, network_rate: float) -> float:
    """R: a fixed benchmark rate (binary measures only) or the network's own rate or mean."""
    if fixed != "network" and measure_type == "binary":
        return float(fixed)
    return network_rate


def intercept_for(linear: np.ndarray, rate: float) -> float:
    """The network intercept at which patients with linear risks ``linear`` expect ``rate`` events
    each on average."""
    return calibrate_intercept(linear, rate * len(linear))


def scaled_totals(expected: np.ndarray, total: float) -> tuple[np.ndarray, float]:
    """Supplied expected totals per unit times one factor so they add up to ``total``: (scaled,
    factor)."""
    expected = np.asarray(expected, float)
    factor = float(total / expected.sum())
    return expected * factor, factor


def benchmark_offset(
    fixed: str | float,
    measure: MeasureSection,
    casemix: CaseMixFit,
    y: np.ndarray,
    codes: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, float]:
    """Per patient (``fixed`` is ``[reporting].benchmark``): the shrinkage fit's offset and expected
    value at the benchmark (benchmark.py), and the ratio's scale.

    Binary: the network intercept is set so the network expects the benchmark rate (a fitted
    model's calibrated intercept when the benchmark is the network; supplied risks shifted on
    the logit scale). Continuous: the case-mix fit's expected values (or supplied ones) times one
    factor so they add up to the network's total; the ratio carries that factor and, for
    log-normal fits, the within-unit over the network smearing factor.
    """
    if measure.type == "binary":
        rate = reference_rate(fixed, measure.type, casemix.events / casemix.patients)
        offset = intercept_for(casemix.linear, rate) + casemix.linear
        return offset, expit(offset), 1.0
    offset = casemix.intercept + casemix.linear
    # 1 for a Gamma fit; Duan's smearing is close, not exact
    expected, factor = scaled_totals(casemix.expected, float(y.sum()))
    if not casemix.fitted:  # supplied expected values: the shrinkage fit's offset moves with them
        return offset + np.log(factor), expected, 1.0
    scale = 1.0 / factor
    # P_i uses the within-unit smearing factor, E_i the network's
    if family_of(measure) == "lognormal":
        d = np.log(y) - offset
        unit_mean = (np.bincount(codes, weights=d) / np.maximum(np.bincount(codes), 1))[codes]
        scale *= float(np.mean(np.exp(d - unit_mean)) / casemix.smearing)
    return offset, expected, scale


def patient_cv2(family: str, dispersion: float) -> float:
    """Squared coefficient of variation of one patient's outcome under a continuous case-mix fit."""
    if family == "gamma":
        return float(dispersion)  # Var = phi * mean^2
    if family == "lognormal":
        return float(np.expm1(dispersion))  # Var = (exp(sigma^2) - 1) * mean^2
    raise ValueError(
        f"no patient variance for case-mix family {family!r}; allowed: gamma, lognormal"
    )


def null_variance(
    measure: MeasureSection, casemix: CaseMixFit, y: np.ndarray, expected: np.ndarray
) -> np.ndarray:
    """Per patient: the variance of the outcome if the patient were treated at the benchmark (the
    funnel's null).

    Binary: e (1 - e) at the patient's expected risk e. Continuous: cv^2 e^2, with one patient's
    squared coefficient of variation from the fitted case-mix family, or, for expected values
    supplied from elsewhere, the network's mean squared relative residual ((y - e) / e)^2
    (a Pearson estimate of the same quantity).
    """
    e = np.asarray(expected, float)
    if measure.type == "binary":
        return e * (1.0 - e)
    if casemix.fitted:
        cv2 = patient_cv2(family_of(measure), casemix.dispersion)
    else:
        cv2 = float(np.mean(((np.asarray(y, float) - e) / e) ** 2))
    return cv2 * e**2
