"""The shrinkage engine against published hierarchical-model results (each check names its
source)."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.config import SamplerSection
from pipeline.shrinkage.model import Cells, ShrinkageSpec, james_stein
from pipeline.shrinkage.sampling import Sampler

# Efron & Morris (1975, JASA 70:311-319; 1977 Scientific American): hits in the first 45 at-bats
# of 18 players and their batting average over the rest of the season.
HITS = np.array([18, 17, 16, 15, 14, 14, 13, 12, 11, 11, 10, 10, 10, 10, 10, 9, 8, 7])
REST = np.array(
    [
        0.346,
        0.298,
        0.276,
        0.222,
        0.273,
        0.270,
        0.263,
        0.210,
        0.269,
        0.230,
        0.264,
        0.256,
        0.303,
        0.264,
        0.226,
        0.285,
        0.316,
        0.200,
    ]
)


def test_efron_morris_james_stein_factor():
    y = HITS / 45
    ybar = y.mean()
    estimates, c = james_stein(y, ybar * (1 - ybar) / 45)
    assert (round(ybar, 3), round(c, 3)) == (0.265, 0.212)  # published (1977)
    # computed from the published data (reference-checks.md, section 2)
    assert c == pytest.approx(0.211653, abs=1e-6)
    assert np.round(estimates, 3).tolist() == [
        0.294,
        0.289,
        0.285,
        0.280,
        0.275,
        0.275,
        0.270,
        0.266,
        0.261,
        0.261,
        0.256,
        0.256,
        0.256,
        0.256,
        0.256,
        0.252,
        0.247,
        0.242,
    ]
    assert np.sum((y - REST) ** 2) == pytest.approx(0.0754, abs=1e-4) and np.sum(
        (estimates - REST) ** 2
    ) == pytest.approx(0.0213, abs=1e-4)


def _settings(**kw):
    return SamplerSection(**{"chains": 4, "draws": 2000, "tune": 1000, "cores": 2, "seed": 5, **kw})


@pytest.mark.slow
def test_eight_schools_posterior_matches_the_stan_reference():
    # Rubin (1981); Gelman et al., BDA3 section 5.5. Reference posterior means from
    # stan-dev/posteriordb
    # (eight_schools_noncentered; mu ~ N(0, 5), tau ~ half-Cauchy(0, 5)): MC s.e. 0.03-0.06.
    y = np.array([28, 8, -3, 7, -1, 1, 18, 12.0])
    sigma = np.array([15, 10, 16, 11, 9, 11, 10, 18.0])
    spec = ShrinkageSpec(
        priors={"mu": ("Normal", {"mu": 0.0, "sigma": 5.0}), "tau": ("HalfCauchy", {"beta": 5.0})},
        likelihood="normal",
    )
    cells = Cells(unit=np.arange(8), offset=np.zeros(8), n=1 / sigma**2, r=y, n_units=8)
    draws, diagnostics = Sampler(spec, _settings(target_accept=0.99)).run(cells, seed=5)
    assert diagnostics.rhat_max < 1.01 and diagnostics.divergences < 20
    theta = draws["mu"][:, None] + draws["u"]
    # Tolerance 0.25: about 4 Monte Carlo standard errors of these means from ~1,500 effective
    # draws.
    assert draws["mu"].mean() == pytest.approx(4.4105, abs=0.25)
    assert draws["tau"].mean() == pytest.approx(3.6021, abs=0.25)
    reference = [6.1505, 4.9396, 3.9059, 4.7960, 3.6144, 4.0511, 6.3172, 4.8840]
    assert theta.mean(axis=0) == pytest.approx(reference, abs=0.3)


@pytest.mark.slow
def test_rat_tumour_beta_binomial_posterior():
    # Tarone (1982); Gelman et al., BDA3 section 5.3, prior p(alpha, beta) proportional to (alpha +
    # beta)^(-5/2).
    # Posterior means computed from the published data by quadrature (reference-checks.md, section
    # 4):
    # E[alpha] 2.403, E[beta] 14.320; the published posterior mode of (log(alpha/beta),
    # log(alpha+beta)) is (-1.79, 2.74).
    y = np.array(
        [0] * 14
        + [1] * 8
        + [2] * 9
        + [
            1,
            5,
            2,
            5,
            3,
            2,
            7,
            7,
            3,
            3,
            2,
            9,
            10,
            4,
            4,
            4,
            4,
            4,
            4,
            4,
            10,
            4,
            4,
            4,
            5,
            11,
            12,
            5,
            5,
            6,
            5,
            6,
            6,
            6,
            6,
            16,
            15,
            15,
            9,
            4,
        ],
        dtype=float,
    )
    n = np.array(
        [
            20,
            20,
            20,
            20,
            20,
            20,
            20,
            19,
            19,
            19,
            19,
            18,
            18,
            17,
            20,
            20,
            20,
            20,
            19,
            19,
            18,
            18,
            25,
            24,
            23,
            20,
            20,
            20,
            20,
            20,
            20,
            10,
            49,
            19,
            46,
            27,
            17,
            49,
            47,
            20,
            20,
            13,
            48,
            50,
            20,
            20,
            20,
            20,
            20,
            20,
            20,
            48,
            19,
            19,
            19,
            22,
            46,
            49,
            20,
            20,
            23,
            19,
            22,
            20,
            20,
            20,
            52,
            46,
            47,
            24,
            14,
        ],
        dtype=float,
    )
    assert len(y) == len(n) == 71
    cells = Cells(unit=np.arange(71), offset=np.zeros(71), n=n, r=y, n_units=71)
    draws, diagnostics = Sampler(ShrinkageSpec(pooling="beta"), _settings()).run(cells, seed=3)
    assert diagnostics.failures() == []
    # Tolerance: 4 Monte Carlo standard errors (posterior SDs about 0.9 and 5.5, >= 1,000 effective
    # draws).
    assert draws["alpha"].mean() == pytest.approx(2.403, abs=0.12)
    assert draws["beta"].mean() == pytest.approx(14.320, abs=0.7)
    theta_71 = ((draws["alpha"] + y[-1]) / (draws["alpha"] + draws["beta"] + n[-1])).mean()
    assert theta_71 == pytest.approx(0.2109, abs=0.003)


@pytest.mark.slow
def test_simulation_based_calibration_of_unit_effect_intervals():
    """Over 100 networks simulated from the model's own prior, 90% and 95% intervals cover the true
    unit effects within 2 percentage points of nominal (Talts et al. 2018, arXiv:1804.06788; the
    2-point band is this project's target)."""
    from scipy.special import expit

    rng = np.random.default_rng(2026)
    sampler = Sampler(
        ShrinkageSpec(), SamplerSection(chains=2, draws=500, tune=500, cores=2, seed=1)
    )
    hits = {0.90: [], 0.95: []}
    n_units = 20
    for network in range(100):
        mu, tau = rng.normal(0, 1), abs(rng.normal(0, 1))  # the model's priors
        effect = rng.normal(0, tau, n_units)
        size = rng.integers(20, 400, n_units)
        unit = np.repeat(np.arange(n_units), size)
        # case-mix offsets on a 0.1 grid, as risk groups would give
        offset = rng.normal(-1.5, 0.7, len(unit)).round(1)
        y = (rng.random(len(unit)) < expit(offset + mu + effect[unit])).astype(float)
        draws, _ = sampler.run(Cells.from_patients(unit, offset, y, n_units), seed=network)
        for level in hits:
            lo, hi = np.quantile(draws["u"], [(1 - level) / 2, (1 + level) / 2], axis=0)
            hits[level].extend((lo <= effect) & (effect <= hi))
    for level, inside in hits.items():
        assert len(inside) == 2000
        assert abs(np.mean(inside) - level) <= 0.02, (level, np.mean(inside))


@pytest.mark.slow
def test_simulation_based_calibration_with_unit_level_predictors():
    """The same check with two unit-level predictors of the prior mean (targets.py): over 100
    networks drawn from the model's own priors (beta ~ Normal(0, 1) per standard deviation), 90% and
    95% intervals of the unit effects u = a - mu, and of the coefficients, cover the truth within 2
    (effects) and 6 (coefficients, 200 values) percentage points of nominal (Talts et al. 2018). A
    network's units share mu, so per-network coverage varies (SD about 12 points here) and the
    2-point band is about 1.7 standard errors of the mean; measured: 94.4% at 95% with 1,000 draws
    per chain, the same networks as here."""
    from scipy.special import expit

    rng = np.random.default_rng(2027)
    sampler = Sampler(
        ShrinkageSpec(predictors=2), SamplerSection(chains=2, draws=500, tune=500, cores=2, seed=1)
    )
    hits = {0.90: [], 0.95: []}
    beta_hits = {0.90: [], 0.95: []}
    n_units = 20
    for network in range(100):
        mu, tau, beta = rng.normal(0, 1), abs(rng.normal(0, 1)), rng.normal(0, 1, 2)
        size = rng.integers(20, 400, n_units)
        raw = np.column_stack([np.log(size), rng.normal(0, 1, n_units)])
        # standardised over the units, as targets.design does
        w = (raw - raw.mean(axis=0)) / raw.std(axis=0)
        effect = w @ beta + rng.normal(0, tau, n_units)
        unit = np.repeat(np.arange(n_units), size)
        offset = rng.normal(-1.5, 0.7, len(unit)).round(1)
        y = (rng.random(len(unit)) < expit(offset + mu + effect[unit])).astype(float)
        cells = Cells.from_patients(unit, offset, y, n_units).with_predictors(w)
        draws, _ = sampler.run(cells, seed=network)
        for level in hits:
            q = [(1 - level) / 2, (1 + level) / 2]
            lo, hi = np.quantile(draws["u"], q, axis=0)
            hits[level].extend((lo <= effect) & (effect <= hi))
            lo, hi = np.quantile(draws["beta"], q, axis=0)
            beta_hits[level].extend((lo <= beta) & (beta <= hi))
    for level in hits:
        assert abs(np.mean(hits[level]) - level) <= 0.02, (level, np.mean(hits[level]))
        assert abs(np.mean(beta_hits[level]) - level) <= 0.06, (level, np.mean(beta_hits[level]))
