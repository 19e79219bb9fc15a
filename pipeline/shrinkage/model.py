"""Shrinkage fit: a hierarchical model with one random intercept per unit.

Spec, build, run (three steps, each testable alone):

* :class:`ShrinkageSpec` is the plain description (priors, parameterisation);
* :func:`build_model` turns a spec and a :class:`Cells` table into a ``pm.Model`` whose
  data are ``pm.Data`` containers, so one compiled model serves every measure of a cycle;
* :func:`run` samples it (nutpie, or PyMC's own NUTS) and checks the diagnostics.

Model (binary measure; patient j in unit i, case-mix linear risk x_ij from the case-mix fit)::

    logit P(y_ij = 1) = c + mu + u_i + x_ij,  u_i = w_i . beta + tau * z_i,  z_i ~ Normal(0, 1)
    mu ~ Normal(0, 1),  tau ~ HalfNormal(1),  beta_k ~ Normal(0, 1)

w_i are the unit's standardised predictors of what it is pulled towards (targets.py; none by
default, and then u_i = tau * z_i): the prior mean of a unit's intercept is mu + w_i . beta.

Patients of one unit with the same linear risk are pooled into one binomial cell, which
changes no likelihood value (the binomial is the sum of its Bernoullis).

The same random-intercept structure serves the other likelihoods (the ``LIKELIHOODS`` table),
each written through exact per-unit sufficient statistics, so cost grows with units, not
patients:

* ``poisson`` (unit-level input): observed events O_i ~ Poisson(E_i exp(mu + u_i)), with the
  supplied expected events E_i as the offset;
* ``gamma`` (continuous, log link): y_ij ~ Gamma(shape k, mean exp(c + x_ij + mu + u_i)); the
  likelihood depends on the data only through n_i, sum_j y_ij exp(-(c + x_ij)) and
  sum_j (log y_ij - c - x_ij);
* ``lognormal``: log y_ij - c - x_ij ~ Normal(mu + u_i, sigma); sufficient statistics n_i and
  the sum and sum of squares of those residuals.

For all three the predicted-over-expected ratio of a unit is exactly exp(mu + u_i) (log-normal:
times the ratio of within-unit to network smearing factors).

Per unit the ratio to the benchmark (one definition for every published number: benchmark.py)
is, draw by draw, ``P_i / E_i`` with ``P_i = sum_j expit(c + mu + u_i + x_ij)`` and
``E_i = sum_j expit(c + x_ij)``, c the benchmark's calibrated intercept, so E_i is the published
expected count; the risk-standardised rate is that ratio times the benchmark rate.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

# Built-in priors: a data table (name -> distribution, parameters), printed on the methods page.
PRIORS: dict[str, tuple[str, dict[str, float]]] = {
    "mu": ("Normal", {"mu": 0.0, "sigma": 1.0}),
    "tau": ("HalfNormal", {"sigma": 1.0}),
}
# Coefficients of the unit-level predictors (targets.py), per standard deviation of each
# predictor on the link scale; only in models with predictors.
PREDICTOR_PRIOR: tuple[str, dict[str, float]] = ("Normal", {"mu": 0.0, "sigma": 1.0})
# Likelihoods: name -> (what it models, extra priors for its own parameters).
LIKELIHOODS: dict[str, tuple[str, dict[str, tuple[str, dict[str, float]]]]] = {
    "binomial": ("binary outcomes per patient, pooled into (unit, risk) cells", {}),
    "poisson": ("observed events per unit, with the supplied expected events as offset", {}),
    "gamma": (
        "a positive outcome per patient, Gamma with log link",
        {"shape": ("HalfNormal", {"sigma": 5.0})},
    ),
    "lognormal": (
        "a positive outcome per patient, normal on the log scale",
        {"sigma": ("HalfNormal", {"sigma": 1.0})},
    ),
    "normal": (
        "one estimate per unit with a known standard error (r = estimate, n = 1 / se^2)",
        {},
    ),
}

# How much units borrow from each other: a data table of the built-in choices.
POOLING = {
    "partial": "unit intercepts from a common Normal(mu, tau), non-centred: the published model",
    "none": "independent unit intercepts with a Logistic(0, 1) prior, which is a uniform prior "
    "on each "
    "unit's rate; nothing is borrowed between units (used to check the engine against exact "
    "results)",
    "beta": "unit rates from a common Beta(alpha, beta) with p(alpha, beta) proportional to "
    "(alpha + beta)^(-5/2) "
    "(Gelman et al., BDA3 section 5.3); binomial cells without case mix only (a published "
    "check of the engine)",
}


@dataclass(frozen=True)
class ShrinkageSpec:
    """What the shrinkage model is, without data."""

    priors: dict[str, tuple[str, dict[str, float]]] = field(default_factory=lambda: dict(PRIORS))
    pooling: str = "partial"
    likelihood: str = "binomial"
    # columns of unit-level predictors of the prior mean (targets.py); partial pooling only
    predictors: int = 0

    def __post_init__(self) -> None:
        if self.pooling not in POOLING:
            raise ValueError(f"pooling must be one of {', '.join(POOLING)}; got {self.pooling!r}")
        if self.likelihood not in LIKELIHOODS:
            raise ValueError(
                f"likelihood must be one of {', '.join(LIKELIHOODS)}; got {self.likelihood!r}"
            )
        for name, prior in LIKELIHOODS[self.likelihood][1].items():
            self.priors.setdefault(name, prior)
        if self.predictors:
            if self.pooling != "partial":
                raise ValueError("unit-level predictors need partial pooling")
            self.priors.setdefault("beta", PREDICTOR_PRIOR)

    @property
    def sampled(self) -> list[str]:
        """Names of the sampled parameters (the ones diagnostics are computed on)."""
        own = list(LIKELIHOODS[self.likelihood][1])
        return (
            {"partial": ["mu", "tau", "v"], "none": ["a"], "beta": ["phi", "kappa"]}[self.pooling]
            + own
            + (["beta"] if self.predictors else [])
        )

    def describe(self) -> list[str]:
        """One line per prior, in the notation of the methods page."""
        return [
            f"{name} ~ {dist}({', '.join(f'{k}={v:g}' for k, v in args.items())})"
            for name, (dist, args) in self.priors.items()
        ]


@dataclass(frozen=True)
class Cells:
    """Patients pooled by (unit, linear risk): the exact sufficient statistics of the fit."""

    unit: np.ndarray  # unit code 0..n_units-1
    # calibrated intercept + linear risk (binomial), log expected events (poisson), 0 otherwise
    offset: np.ndarray
    n: np.ndarray  # patients in the cell
    # events (binomial, poisson); gamma: sum y exp(-offset); lognormal: sum of log residuals
    r: np.ndarray
    n_units: int
    # gamma: sum of (log y - offset); lognormal: sum of squared log residuals
    q: np.ndarray | None = None
    # (n_units, predictors): standardised unit-level predictors (targets.py), or None
    w: np.ndarray | None = None

    def with_predictors(self, w: np.ndarray | None) -> Cells:
        from dataclasses import replace

        return replace(self, w=None if w is None or w.shape[1] == 0 else np.asarray(w, float))

    @classmethod
    def from_patients(
        cls, unit_codes: np.ndarray, offset: np.ndarray, y: np.ndarray, n_units: int
    ) -> Cells:
        frame = pd.DataFrame({"unit": unit_codes, "offset": offset, "y": y})
        grouped = (
            frame.groupby(["unit", "offset"], sort=True)["y"].agg(["size", "sum"]).reset_index()
        )
        return cls(
            unit=grouped["unit"].to_numpy(np.int64),
            offset=grouped["offset"].to_numpy(float),
            n=grouped["size"].to_numpy(float),
            r=grouped["sum"].to_numpy(float),
            n_units=n_units,
        )

    @classmethod
    def from_units(
        cls, unit_codes: np.ndarray, observed: np.ndarray, expected: np.ndarray, n_units: int
    ) -> Cells:
        """Unit-level input: one Poisson cell per unit with log(expected) as its offset."""
        order = np.argsort(unit_codes)
        return cls(
            unit=np.asarray(unit_codes, np.int64)[order],
            offset=np.log(np.asarray(expected, float))[order],
            n=np.ones(len(order)),
            r=np.asarray(observed, float)[order],
            n_units=n_units,
        )

    @classmethod
    def from_continuous(
        cls,
        unit_codes: np.ndarray,
        offset: np.ndarray,
        y: np.ndarray,
        n_units: int,
        likelihood: str,
    ) -> Cells:
        """Per-unit sufficient statistics of a positive outcome (gamma or lognormal)."""
        frame = pd.DataFrame({"unit": unit_codes, "n": 1.0})
        if likelihood == "gamma":
            frame["r"], frame["q"] = y * np.exp(-offset), np.log(y) - offset
        else:
            d = np.log(y) - offset
            frame["r"], frame["q"] = d, d * d
        sums = frame.groupby("unit", sort=True).sum()
        return cls(
            unit=sums.index.to_numpy(np.int64),
            offset=np.zeros(len(sums)),
            n=sums["n"].to_numpy(float),
            r=sums["r"].to_numpy(float),
            n_units=n_units,
            q=sums["q"].to_numpy(float),
        )

    def data(self) -> dict[str, np.ndarray]:
        out = {"unit": self.unit, "offset": self.offset, "n": self.n, "r": self.r}
        if self.q is not None:
            out["q"] = self.q
        if self.w is not None:
            out["w"] = self.w
        return out


# A unit's intercept is sampled centred (a_i ~ Normal(mu, tau)) when its own data pin it down
# (standard error below CENTRE_BELOW times a rough estimate of tau), non-centred
# (a_i = mu + tau * v_i) otherwise: the posterior is the same either way, but NUTS explores it in
# fewer steps (Papaspiliopoulos, Roberts & Skold 2007, Statistical Science 22:59); the measured
# choice of the threshold is in DEVELOPERS.md, "Parameterisation".
CENTRE_BELOW = 0.25


def james_stein(y: np.ndarray, s2: float) -> tuple[np.ndarray, float]:
    """Empirical-Bayes (James-Stein) estimates towards the grand mean for k means of common known
    variance s2.

    Efron & Morris (1975, JASA 70:311): z_i = ybar + c (y_i - ybar), c = 1 - (k - 3) s2 / sum (y_i -
    ybar)^2. Returns (estimates, c).
    """
    y = np.asarray(y, dtype=float)
    ybar = y.mean()
    c = 1 - (len(y) - 3) * s2 / np.sum((y - ybar) ** 2)
    return ybar + c * (y - ybar), float(c)


def rough_tau(estimate: np.ndarray, se: np.ndarray) -> float:
    """Method-of-moments between-unit SD (variance of the estimates minus their mean sampling
    variance), at least 0.05."""
    keep = np.isfinite(estimate) & (se < 5)
    if keep.sum() < 3:
        return 0.05
    return float(np.sqrt(max(np.var(estimate[keep]) - np.mean(se[keep] ** 2), 0.05**2)))


def unit_estimates(spec: ShrinkageSpec, cells: Cells, curves=None) -> tuple[np.ndarray, np.ndarray]:
    """Rough estimate and standard error of each unit's intercept from its own data (chooses the
    parameterisation only)."""
    k = cells.n_units
    if curves is not None:
        return curves.centre, curves.se
    n = np.bincount(cells.unit, weights=cells.n, minlength=k)
    safe = np.maximum(n, 1.0)
    if spec.likelihood == "poisson":
        events = np.bincount(cells.unit, weights=cells.r, minlength=k)
        expected = np.bincount(cells.unit, weights=np.exp(cells.offset), minlength=k)
        return np.where(
            n > 0, np.log((events + 0.5) / np.maximum(expected, 1e-9)), np.nan
        ), 1 / np.sqrt(np.maximum(events, 1.0))
    s1 = np.bincount(cells.unit, weights=cells.r, minlength=k)
    if spec.likelihood == "normal":
        return np.where(n > 0, s1, np.nan), 1 / np.sqrt(np.maximum(n, 1e-12))
    if spec.likelihood == "binomial":
        p = (s1 + 0.5) / (n + 1)
        return np.where(n > 0, np.log(p / (1 - p)), np.nan), 1 / np.sqrt(
            np.maximum(n * p * (1 - p), 1e-12)
        )
    if spec.likelihood == "lognormal" and cells.q is not None:
        s2 = np.bincount(cells.unit, weights=cells.q, minlength=k)
        var = np.where(n > 1, (s2 - s1**2 / safe) / np.maximum(n - 1, 1), 1.0)
        return np.where(n > 0, s1 / safe, np.nan), np.sqrt(var / safe)
    # gamma: shape about 1 (enough here)
    return np.where(n > 0, np.log(np.maximum(s1, 1e-300) / safe), np.nan), 1 / np.sqrt(safe)


CURVE_DEGREE = 32  # curves.DEGREE, repeated here so that choosing does not import numba


def model_data(spec: ShrinkageSpec, cells: Cells) -> tuple[dict[str, np.ndarray], object]:
    """Arrays the model reads (swappable per measure) and, for binomial cells, their curves.

    Binomial measures use each unit's likelihood curve when that is smaller than the cells
    (more cells than units x series length), and the exact cells otherwise.
    """
    curves = None
    if spec.pooling == "beta":
        return {"n": cells.n, "r": cells.r}, None
    if spec.likelihood == "binomial" and len(cells.n) > cells.n_units * (CURVE_DEGREE + 1):
        # cheaper than the cells, and within 1e-6 of them (curves.py)
        from pipeline.shrinkage.curves import build_curves

        curves = build_curves(cells.unit, cells.offset, cells.n, cells.r, cells.n_units)
        data = curves.data()
        if cells.w is not None:
            data["w"] = cells.w
    else:
        data = cells.data()
    if spec.pooling == "partial":
        estimate, se = unit_estimates(spec, cells, curves)
        data["centred"] = (se < CENTRE_BELOW * rough_tau(estimate, se)).astype(float)
    return data, curves


def build_model(spec: ShrinkageSpec, cells: Cells, data: dict[str, np.ndarray] | None = None):
    """Build the PyMC model of ``spec`` with ``cells`` (or their ``model_data``) as swappable
    data."""
    import pymc as pm
    import pytensor.tensor as pt

    def prior(name: str, **kw):
        dist, args = spec.priors[name]
        return getattr(pm, dist)(name, **args, **kw)

    arrays = data if data is not None else model_data(spec, cells)[0]
    with pm.Model() as model:
        data = {k: pm.Data(k, v) for k, v in arrays.items()}
        if spec.pooling == "beta":
            _beta_binomial(data)
            return model
        a = _intercepts(spec, prior, data, cells.n_units)
        if "coef" in data:
            from pipeline.shrinkage.curves import curve_loglik

            pm.Potential("loglik", pt.sum(curve_loglik(a, data)))
        else:
            eta = data["offset"] + a[data["unit"]]
            pm.Potential("loglik", pt.sum(_loglik(spec, prior, data, eta)))
    return model


def _beta_binomial(data: dict) -> None:
    """Rates integrated out: the beta-binomial likelihood of each cell (inside a model context)."""
    import pymc as pm
    import pytensor.tensor as pt

    # phi = log(alpha / beta), kappa = log(alpha + beta)
    phi, kappa = pm.Flat("phi"), pm.Flat("kappa")
    alpha, beta = (
        pm.Deterministic("alpha", pt.exp(kappa) * pt.sigmoid(phi)),
        pm.Deterministic("beta", pt.exp(kappa) * pt.sigmoid(-phi)),
    )
    # BDA3 eq. 5.10 with the Jacobian
    pm.Potential("prior", pt.log(alpha) + pt.log(beta) - 2.5 * pt.log(alpha + beta))
    r, n = data["r"], data["n"]
    pm.Potential(
        "loglik",
        pt.sum(
            pt.gammaln(alpha + r)
            + pt.gammaln(beta + n - r)
            - pt.gammaln(alpha + beta + n)
            + pt.gammaln(alpha + beta)
            - pt.gammaln(alpha)
            - pt.gammaln(beta)
        ),
    )


def _intercepts(spec: ShrinkageSpec, prior, data: dict, n_units: int):
    """Each unit's intercept: partially pooled (centred or not, per unit) towards its target, or
    unpooled (inside a model context)."""
    import pymc as pm
    import pytensor.tensor as pt

    if spec.pooling != "partial":
        return pm.Logistic("a", 0.0, 1.0, shape=n_units)
    mu = prior("mu")
    tau = prior("tau")
    v = pm.Flat("v", shape=n_units)
    c = data["centred"]
    target = mu + pt.dot(data["w"], prior("beta", shape=spec.predictors)) if spec.predictors else mu
    pm.Potential(
        "units",
        pt.sum(
            c * pm.logp(pm.Normal.dist(target, tau), v)
            + (1 - c) * pm.logp(pm.Normal.dist(0.0, 1.0), v)
        ),
    )
    return c * v + (1 - c) * (target + tau * v)


def _loglik(spec: ShrinkageSpec, prior, data: dict, eta):
    """Per-cell log-likelihood, without terms that are constant in the parameters."""
    import pytensor.tensor as pt

    n, r = data["n"], data["r"]
    if spec.likelihood == "binomial":  # r*eta - n*log(1 + exp(eta))
        return r * eta - n * pt.softplus(eta)
    if spec.likelihood == "poisson":  # r*eta - exp(eta), eta = log E + mu + u
        return r * eta - n * pt.exp(eta)
    # sum over patients of the Gamma(k, k/m) log density, m = exp(offset + eta)
    if spec.likelihood == "gamma":
        k = prior("shape")
        return (
            n * (k * pt.log(k) - pt.gammaln(k)) + k * data["q"] - k * n * eta - k * r * pt.exp(-eta)
        )
    if spec.likelihood == "normal":  # r = estimate, n = precision: Normal(r | eta, 1 / sqrt(n))
        return -0.5 * n * (r - eta) ** 2
    sigma = prior("sigma")  # lognormal: residuals d ~ Normal(eta, sigma)
    return -n * pt.log(sigma) - (data["q"] - 2 * eta * r + n * eta**2) / (2 * sigma**2)
