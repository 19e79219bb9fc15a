"""Funnel plot control limits (Spiegelhalter 2005) for a measure's units.

A funnel plot shows each unit's case-mix-adjusted value against its number of cases, with
control limits around the benchmark that narrow as units get bigger. Rates use exact binomial
limits with the interpolation of Spiegelhalter (2005, *Statistics in Medicine* 24:1185-1202,
appendix A.1.1), so limits move smoothly with the number of cases instead of in steps; O/E ratios
can use the Poisson version. Continuous measures (such as length of stay) use the normal
approximation with the case-mix fit's coefficient of variation.

Units often differ by more than chance alone allows (over-dispersion). The optional widening
follows Spiegelhalter (2005, *Quality and Safety in Health Care* 14:347-351): z-scores are
winsorised at the 10th and 90th percentiles, phi is their mean square, and an additive
between-unit variance tau^2 widens every limit. The funnel is a view of the raw O/E data beside
the shrinkage fit; the groups on the site come from the shrinkage fit, not from the funnel.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

LEVELS = (0.95, 0.998)  # two-sided coverage of the inner and outer limits
WINSOR = 0.10


def binomial_limit(theta0: float, n, p: float) -> np.ndarray:
    """Exact binomial control limit at cumulative probability ``p`` for ``n`` cases (interpolated)."""
    n = np.asarray(n, dtype=float)
    r = stats.binom.ppf(p, n, theta0)  # smallest r with P(R <= r) >= p
    upper, lower = stats.binom.cdf(r, n, theta0), stats.binom.cdf(r - 1, n, theta0)
    alpha = (upper - p) / np.where(upper > lower, upper - lower, 1.0)
    return (r - alpha) / n


def poisson_limit(expected, p: float) -> np.ndarray:
    """Exact Poisson control limit for an O/E ratio with ``expected`` events (interpolated the same way)."""
    e = np.asarray(expected, dtype=float)
    r = stats.poisson.ppf(p, e)
    upper, lower = stats.poisson.cdf(r, e), stats.poisson.cdf(r - 1, e)
    alpha = (upper - p) / np.where(upper > lower, upper - lower, 1.0)
    return (r - alpha) / e


def normal_limit(theta0: float, se, p: float) -> np.ndarray:
    return theta0 + stats.norm.ppf(p) * np.asarray(se, dtype=float)


def overdispersion(y, theta0: float, se) -> tuple[float, float]:
    """(phi, tau^2): the winsorised over-dispersion factor and the additive between-unit variance."""
    y, se = np.asarray(y, float), np.asarray(se, float)
    z = (y - theta0) / se
    lo, hi = np.quantile(z, [WINSOR, 1 - WINSOR])
    zw = np.clip(z, lo, hi)
    k = len(z)
    phi = float(np.mean(zw**2))
    w = 1.0 / se**2
    tau2 = max(0.0, (k * phi - (k - 1)) / (w.sum() - (w**2).sum() / w.sum()))
    return phi, float(tau2)


@dataclass(frozen=True)
class Funnel:
    """A measure's funnel: per-unit points and limits, the curves to draw, and the dispersion found."""

    points: pd.DataFrame  # unit_name, group, cases, value, and the four limits at each unit's size
    curves: pd.DataFrame  # cases, then one column per limit, on a grid for drawing
    benchmark: float
    phi: float
    tau2: float
    widened: bool
    method: str  # "exact binomial", "normal approximation"

    def scaled(self, k: float) -> tuple[pd.DataFrame, pd.DataFrame]:
        """(points, curves) with values and limits multiplied by ``k`` (100 for percentages)."""
        return (self.points.assign(**{c: self.points[c] * k for c in ("value", *LIMIT_COLUMNS)}),
                self.curves.assign(**{c: self.curves[c] * k for c in LIMIT_COLUMNS}))


LIMIT_COLUMNS = ("lower_998", "lower_95", "upper_95", "upper_998")


def _limits(method: str, theta0: float, cases: np.ndarray, se_at, tau2: float) -> dict[str, np.ndarray]:
    out = {}
    for name, level in zip(LIMIT_COLUMNS, (0.001, 0.025, 0.975, 0.999)):
        if method == "exact binomial" and tau2 == 0:
            out[name] = binomial_limit(theta0, cases, level)
        else:
            out[name] = normal_limit(theta0, np.sqrt(se_at(cases) ** 2 + tau2), level)
    return out


def funnel(table: pd.DataFrame, kind: str, network_rate: float, benchmark: float, cv2: float = float("nan"), widen: bool = False) -> Funnel | None:
    """The funnel for a measure's reported units; None when fewer than 3 units are reported.

    ``table`` is the measure's results table (cases, observed, expected, status, group). Each
    unit's value is its published O/E ratio times the benchmark rate (or mean): its indirectly
    standardised rate, centred on the same benchmark as every other number (benchmark.py). ``cv2`` is the squared coefficient of variation of one patient's outcome (continuous
    measures only).
    """
    t = table[(table["status"] == "reported") & (table["expected"] > 0)]
    if len(t) < 3:
        return None
    cases = t["cases"].to_numpy(float)
    value = (t["observed"] / t["expected"]).to_numpy() * benchmark  # the published O/E on the benchmark's scale (benchmark.py)
    if kind == "binary":
        method = "exact binomial"
        def se_at(n):
            return np.sqrt(benchmark * (1 - benchmark) / np.asarray(n, float))
    else:
        if not np.isfinite(cv2) or cv2 <= 0:
            return None
        method = "normal approximation"
        def se_at(n):
            return benchmark * np.sqrt(cv2 / np.asarray(n, float))
    phi, tau2 = overdispersion(value, benchmark, se_at(cases))
    used_tau2 = tau2 if widen else 0.0
    grid = np.unique(np.round(np.geomspace(max(1.0, cases.min() * 0.8), cases.max() * 1.1, 200)))
    points = pd.DataFrame({"unit_name": t["unit_name"].to_numpy(), "group": t["group"].to_numpy(), "cases": cases, "value": value})
    for name, limit in _limits(method, benchmark, cases, se_at, used_tau2).items():
        points[name] = limit
    curves = pd.DataFrame({"cases": grid, **_limits(method, benchmark, grid, se_at, used_tau2)})
    if kind == "binary":
        curves[list(LIMIT_COLUMNS)] = curves[list(LIMIT_COLUMNS)].clip(lower=0.0)
    if widen:
        method = "normal approximation widened for over-dispersion"
    return Funnel(points=points, curves=curves, benchmark=benchmark, phi=phi, tau2=tau2, widened=widen, method=method)


def outside(f: Funnel) -> dict[str, int]:
    """How many units sit outside each pair of limits."""
    p = f.points
    return {
        "95": int(((p["value"] < p["lower_95"]) | (p["value"] > p["upper_95"])).sum()),
        "998": int(((p["value"] < p["lower_998"]) | (p["value"] > p["upper_998"])).sum()),
        "units": len(p),
    }


def patient_cv2(family: str, dispersion: float) -> float:
    """Squared coefficient of variation of one patient's outcome under a continuous case-mix fit."""
    if family == "gamma":
        return dispersion  # Var = phi * mean^2
    if family == "lognormal":
        return float(np.expm1(dispersion))  # Var = (exp(sigma^2) - 1) * mean^2
    return float("nan")


def for_measure(result, widen: bool) -> Funnel | None:
    """The funnel of one measure's results (``MeasureResult``)."""
    cv2 = patient_cv2(result.casemix.family, result.casemix.dispersion) if result.measure.type == "continuous" else float("nan")
    return funnel(result.table, result.measure.type, result.network_rate, result.benchmark, cv2, widen)
