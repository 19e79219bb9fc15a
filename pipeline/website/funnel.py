"""Funnel plot control limits (Spiegelhalter 2005) for a measure's units, from each unit's expected
count.

A funnel plot shows each unit's indirectly standardised value, its published O/E times the
benchmark R, against its precision, with control limits around R that narrow as the precision
grows. Under "no difference between units" a unit's observed total O has mean E (its published
expected total) and variance V (the sum over its patients of the variance each would have at the
benchmark), so its O/E has mean 1 and variance 1 / rho with rho = E^2 / V, the precision on the
x axis (Spiegelhalter 2005, *Statistics in Medicine* 24:1185-1202, section 2: a funnel is drawn
against the precision of the null distribution; from memory). The limits follow each unit's own
null distribution, so a unit of low-risk patients gets the wide limits its few expected events call
for:

* unit-level counts (observed and expected events per unit): O ~ Poisson(E), the paper's limits
  for indirectly standardised ratios, and rho = E;
* binary outcomes with patient risks p: V = sum p(1 - p); O is approximated by a binomial with the
  same mean and variance at the network's average p (n' = rho (1 - p) / p cases; exactly the
  paper's binomial limits when every patient has the same risk);
* continuous outcomes (length of stay, cost): V = cv^2 x sum of the squared expected values, cv^2
  being one patient's squared coefficient of variation under the case-mix fit, and O/E is
  approximated by a gamma distribution with mean 1 and variance 1 / rho (our choice over the
  paper's normal approximation, which is too narrow on the high side for small units; checked by
  simulation in the tests).

Discrete limits are interpolated as in the paper's appendix A.1.1, so they move smoothly.

Units often differ by more than chance alone allows (over-dispersion). The optional widening
follows Spiegelhalter (2005, *Quality and Safety in Health Care* 14:347-351): z-scores are
winsorised at the 10th and 90th percentiles, phi is their mean square, and an additive
between-unit variance tau^2 (on the O/E scale) widens every limit, normal-approximation style.
The funnel is a view of the raw O/E data beside the shrinkage fit; the groups on the site come
from the shrinkage fit, not from the funnel.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from pipeline.config import family_for

LEVELS = (0.95, 0.998)  # two-sided coverage of the inner and outer limits
WINSOR = 0.10


def binomial_limit(theta0: float, n, p: float) -> np.ndarray:
    """Exact binomial control limit at cumulative probability ``p`` for ``n`` cases
    (interpolated)."""
    n = np.asarray(n, dtype=float)
    r = stats.binom.ppf(p, n, theta0)  # smallest r with P(R <= r) >= p
    upper, lower = stats.binom.cdf(r, n, theta0), stats.binom.cdf(r - 1, n, theta0)
    alpha = (upper - p) / np.where(upper > lower, upper - lower, 1.0)
    return np.maximum(r - alpha, 0.0) / n  # no fewer than 0 events: the lower limit stops at 0


def poisson_limit(expected, p: float) -> np.ndarray:
    """Exact Poisson control limit for an O/E ratio with ``expected`` events (interpolated the same
    way)."""
    e = np.asarray(expected, dtype=float)
    r = stats.poisson.ppf(p, e)
    upper, lower = stats.poisson.cdf(r, e), stats.poisson.cdf(r - 1, e)
    alpha = (upper - p) / np.where(upper > lower, upper - lower, 1.0)
    return np.maximum(r - alpha, 0.0) / e


def normal_limit(theta0: float, se, p: float) -> np.ndarray:
    return theta0 + stats.norm.ppf(p) * np.asarray(se, dtype=float)


def overdispersion(y, theta0: float, se) -> tuple[float, float]:
    """(phi, tau^2): the winsorised over-dispersion factor and the additive between-unit
    variance."""
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
    """A measure's funnel: per-unit points and limits, the curves to draw, and the dispersion
    found."""

    # unit_name, group, cases, expected, precision, value, and the four limits at each unit's
    # precision
    points: pd.DataFrame
    curves: pd.DataFrame  # precision, then one column per limit, on a grid for drawing
    benchmark: float
    phi: float
    tau2: float
    widened: bool
    # "Poisson", "binomial", "gamma", or "normal approximation widened for over-dispersion"
    method: str

    def scaled(self, k: float) -> tuple[pd.DataFrame, pd.DataFrame]:
        """(points, curves) with values and limits multiplied by ``k`` (100 for percentages)."""
        return (
            self.points.assign(**{c: self.points[c] * k for c in ("value", *LIMIT_COLUMNS)}),
            self.curves.assign(**{c: self.curves[c] * k for c in LIMIT_COLUMNS}),
        )


# Measured by tests/test_funnel_coverage.py (20,000 invented units with no true differences); the
# methods page quotes it. Rerun that test and update this when the limits change.
MEASURED_COVERAGE = "95.1% and 99.8% of units (rates), and 95.0-95.4% and 99.7-99.8% (stays)"
LIMIT_COLUMNS = ("lower_998", "lower_95", "upper_95", "upper_998")
LEVEL_OF = dict(zip(LIMIT_COLUMNS, (0.001, 0.025, 0.975, 0.999), strict=True))
NULLS = ("poisson", "binomial", "gamma")  # the null distribution of O/E, by kind of measure


def ratio_limit(null: str, rho, q: float, mean_risk: float = float("nan")) -> np.ndarray:
    """The O/E ratio below which a unit of precision ``rho`` falls with probability ``q`` by chance
    alone.

    ``mean_risk`` is the network's average patient risk (binomial null only).
    """
    rho = np.asarray(rho, float)
    if null == "poisson":
        return poisson_limit(rho, q)
    if null == "binomial":
        n = np.maximum(np.round(rho * (1 - mean_risk) / mean_risk), 1.0)
        return binomial_limit(mean_risk, n, q) / mean_risk
    if null == "gamma":
        return stats.gamma.ppf(q, rho, scale=1.0 / rho)
    raise ValueError(f"unknown null distribution {null!r}; allowed: {', '.join(NULLS)}")


def _limits(null: str, rho: np.ndarray, mean_risk: float, tau2: float) -> dict[str, np.ndarray]:
    if tau2 > 0:
        return {
            name: np.maximum(normal_limit(1.0, np.sqrt(1.0 / rho + tau2), q), 0.0)
            for name, q in LEVEL_OF.items()
        }
    return {name: ratio_limit(null, rho, q, mean_risk) for name, q in LEVEL_OF.items()}


def funnel(table: pd.DataFrame, null: str, benchmark: float, widen: bool = False) -> Funnel | None:
    """The funnel for a measure's reported units; None when fewer than 3 units are reported.

    ``table`` is the measure's results table: cases, observed, expected, status, group, and
    ``variance``, the variance of each unit's observed total at the benchmark (for the Poisson
    null it may be left out: V = E). Each unit's value is its published O/E ratio times the
    benchmark rate (or mean): its indirectly standardised rate, centred on the same benchmark as
    every other number (benchmark.py). Values and limits are on the benchmark's scale.
    """
    if null not in NULLS:
        raise ValueError(f"unknown null distribution {null!r}; allowed: {', '.join(NULLS)}")
    # small counts are not drawn
    t = table[(table["status"] == "reported") & (table["expected"] > 0) & table["observed"].notna()]
    if null != "poisson":
        t = t[t["variance"] > 0]
    if len(t) < 3:
        return None
    expected = t["expected"].to_numpy(float)
    variance = expected if null == "poisson" else t["variance"].to_numpy(float)
    rho = expected**2 / variance
    mean_risk = float(1.0 - variance.sum() / expected.sum()) if null == "binomial" else float("nan")
    oe = t["observed"].to_numpy(float) / expected  # the published O/E
    phi, tau2 = overdispersion(oe, 1.0, 1.0 / np.sqrt(rho))
    used_tau2 = tau2 if widen else 0.0
    grid = _curve_grid(null, rho, mean_risk)
    points = pd.DataFrame(
        {
            "unit_name": t["unit_name"].to_numpy(),
            "group": t["group"].to_numpy(),
            "cases": t["cases"].to_numpy(float),
            "expected": expected,
            "precision": rho,
            "value": oe * benchmark,
        }
    )
    for name, limit in _limits(null, rho, mean_risk, used_tau2).items():
        points[name] = limit * benchmark
    curves = pd.DataFrame(
        {
            "precision": grid,
            **{k: v * benchmark for k, v in _limits(null, grid, mean_risk, used_tau2).items()},
        }
    )
    method = "normal approximation widened for over-dispersion" if widen else null
    return Funnel(
        points=points,
        curves=curves,
        benchmark=benchmark,
        phi=phi,
        tau2=tau2,
        widened=widen,
        method=method,
    )


def _curve_grid(null: str, rho: np.ndarray, mean_risk: float) -> np.ndarray:
    """Precisions at which the funnel lines are drawn, a little beyond the units' own."""
    if null != "binomial":
        return np.geomspace(rho.min() * 0.8, rho.max() * 1.1, 300)
    # whole numbers of effective cases, so the drawn curve is the points' own limits
    per_case = mean_risk / (1 - mean_risk)
    n = np.unique(
        np.round(
            np.geomspace(max(1.0, rho.min() / per_case * 0.8), rho.max() / per_case * 1.1, 400)
        )
    )
    return n * per_case


def outside(f: Funnel) -> dict[str, int]:
    """How many units sit outside each pair of limits."""
    p = f.points
    return {
        "95": int(((p["value"] < p["lower_95"]) | (p["value"] > p["upper_95"])).sum()),
        "998": int(((p["value"] < p["lower_998"]) | (p["value"] > p["upper_998"])).sum()),
        "units": len(p),
    }


def null_of(result) -> str:
    """The null distribution of a measure's O/E: Poisson for unit-level counts, binomial for
    patients' events, gamma for continuous outcomes."""
    if result.measure.summary:
        return "poisson"
    return family_for(result.measure).funnel_null


def measure_funnel(result, widen: bool) -> Funnel | None:
    """The funnel of one measure's results (``MeasureResult``)."""
    return funnel(result.table, null_of(result), result.benchmark, widen)
