"""Shrinkage fit: spec and build checked without sampling; the sampler against exact results."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.special import expit

from pipeline.config import SamplerSection
from pipeline.shrinkage.draws import unit_draws
from pipeline.shrinkage.model import Cells, ShrinkageSpec, build_model
from pipeline.shrinkage.sampling import Diagnostics, Sampler, fit_failed


def test_spec_is_plain_and_printable():
    spec = ShrinkageSpec()
    assert spec.describe() == ["mu ~ Normal(mu=0, sigma=1)", "tau ~ HalfNormal(sigma=1)"]
    assert spec.sampled == ["mu", "tau", "v"]
    assert ShrinkageSpec(pooling="none").sampled == ["a"]
    with pytest.raises(ValueError, match="pooling must be one of partial, none"):
        ShrinkageSpec(pooling="some")


def _patients(seed=4, n_units=5):
    rng = np.random.default_rng(seed)
    unit = rng.integers(0, n_units, 400)
    # few distinct risks, so cells pool many patients
    offset = rng.choice([-2.0, -1.5, -0.5, 0.25], 400)
    y = (rng.random(400) < expit(offset + 0.3 * (unit - 2))).astype(float)
    return unit, offset, y


def test_cells_keep_every_patient_and_event():
    unit, offset, y = _patients()
    cells = Cells.from_patients(unit, offset, y, 5)
    assert cells.n.sum() == 400 and cells.r.sum() == y.sum()
    assert len(cells.n) <= 5 * 4
    assert (
        np.bincount(cells.unit, weights=cells.n).tolist() == np.bincount(unit, minlength=5).tolist()
    )


@pytest.mark.parametrize(
    "seed,representation", [(4, "cells"), (8, "cells"), (4, "curves"), (8, "curves")]
)
def test_model_gives_the_per_patient_bernoulli_likelihood(seed, representation, monkeypatch):
    """Cells, unit curves and the parameterisation change no log-density difference (vs. scipy per
    patient, no sampling)."""
    from pipeline.shrinkage.model import model_data, rough_tau, unit_estimates

    unit, offset, y = _patients(seed)
    unit[:150] = 0  # one unit with many patients
    cells = Cells.from_patients(unit, offset, y, 5)
    if representation == "curves":  # force the series even though the cells are fewer here
        monkeypatch.setattr("pipeline.shrinkage.model.CURVE_DEGREE", 0)
    estimate, se = unit_estimates(ShrinkageSpec(), cells, model_data(ShrinkageSpec(), cells)[1])
    # so that both parameterisations occur here
    smallest = np.sort(se)[:2].mean() / rough_tau(estimate, se)
    monkeypatch.setattr("pipeline.shrinkage.model.CENTRE_BELOW", smallest)
    data, built = model_data(ShrinkageSpec(), cells)
    assert ("coef" in data) == (representation == "curves")
    centred = data["centred"].astype(bool)
    assert centred.any() and not centred.all()
    model = build_model(ShrinkageSpec(), cells)
    assert sorted(v.name for v in model.free_RVs) == ["mu", "tau", "v"]
    logp = model.compile_logp()
    rng = np.random.default_rng(0)

    def point(mu, tau, v):
        return {"mu": mu, "tau_log__": np.log(tau), "v": v}

    def reference(mu, tau, v):
        a = np.where(centred, v, mu + tau * v)  # each unit's intercept
        loglik = stats.bernoulli.logpmf(y, expit(offset + a[unit])).sum()
        units = np.where(centred, stats.norm.logpdf(v, mu, tau), stats.norm.logpdf(v))
        prior = (
            stats.norm.logpdf(mu, 0, 1)
            + stats.halfnorm.logpdf(tau, scale=1)
            + np.log(tau)
            + units.sum()
        )
        return loglik + prior

    a = (0.1, 0.4, rng.normal(size=5) * 0.5)
    b = (-0.3, 0.9, rng.normal(size=5) * 0.5)
    # The unit curves are a degree-32 series: agreement to 1e-6 (curves.py, measured).
    assert logp(point(*a)) - logp(point(*b)) == pytest.approx(
        reference(*a) - reference(*b), abs=1e-6
    )


def test_unit_curves_match_the_exact_likelihood_and_ratio():
    from pipeline.shrinkage.curves import build_curves, curve_values, max_error

    rng = np.random.default_rng(5)
    unit = np.repeat(np.arange(30), rng.integers(1, 3000, 30))
    offset = rng.normal(-2.0, 1.0, len(unit))
    y = (rng.random(len(unit)) < expit(offset)).astype(float)
    ones = np.ones(len(unit))
    curves = build_curves(unit, offset, ones, y, 30)
    assert max_error(unit, offset, ones, y, 30, curves) < 1e-6
    a = rng.normal(0, 0.5, 30)
    exact = np.bincount(unit, weights=expit(offset + a[unit]))
    assert np.exp(curves.log_predicted(a)) == pytest.approx(exact, rel=1e-8)
    # outside its window a unit's curve continues as a concave quadratic
    far = curves.centre + 3 * curves.width
    slope = curve_values(far, curves.coef, curves.centre, curves.width, curves.edges, True)
    assert np.all(slope < 0)


def test_risk_standardised_ratio_on_a_constructed_example():
    # Constructed example (values computed with numpy; predicted over expected as in Krumholz et al.
    # 2006, with E at the benchmark's intercept as in benchmark.py, from memory): offsets c + x = 0,
    # 1, 2
    # (c is the benchmark's calibrated intercept), mu = -2, u = 0.5, so the unit's intercept moves
    # by -1.5.
    # P = sum expit(-1.5 + x) = 1.182426, E = sum expit(x) = 2.111856, P/E = 0.559899; with
    # benchmark
    # rate 0.20 the RSR is 0.111980. The typical unit (mu alone): sum expit(-2 + x) / E = 0.420552.
    cells = Cells(
        unit=np.zeros(3, dtype=np.int64),
        offset=np.array([0.0, 1.0, 2.0]),
        n=np.ones(3),
        r=np.array([1.0, 0, 0]),
        n_units=1,
    )
    draws = unit_draws(
        cells, {"mu": np.array([-2.0]), "u": np.array([[0.5]]), "tau": np.array([1.0])}
    )
    assert draws.ratio[0, 0] == pytest.approx(0.559899, abs=1e-6)
    assert draws.ratio[0, 0] * 0.20 == pytest.approx(0.111980, abs=1e-6)
    assert draws.typical[0] == pytest.approx(0.420552, abs=1e-6)


def test_failed_diagnostics_are_named_in_the_error():
    d = Diagnostics(
        rhat_max=1.05, ess_bulk_min=120, divergences=3, chains=4, draws=1000, seconds=1.0
    )
    assert d.failures() == [
        "largest R-hat 1.050 is above 1.01",
        "smallest bulk ESS 120 is below 400",
        "3 divergent transitions",
    ]
    message = str(fit_failed("readmit", d))
    assert message.startswith(
        "measure 'readmit': the shrinkage fit did not pass its checks (largest R-hat 1.050"
    )
    assert "Nothing was published" in message


@pytest.mark.slow
@pytest.mark.parametrize("engine", ["nutpie", "pymc"])
def test_no_pooling_reproduces_the_exact_beta_posterior(engine):
    # Conjugacy: with a uniform prior on a rate, r events in n give Beta(1 + r, 1 + n - r)
    # (Gelman et al., Bayesian Data Analysis, 3rd ed., ch. 2). A Logistic(0, 1) prior on the
    # logit is exactly that uniform prior, so pooling "none" must reproduce it.
    r, n = np.array([0, 7, 45]), np.array([10, 20, 300])
    cells = Cells(
        unit=np.arange(3), offset=np.zeros(3), n=n.astype(float), r=r.astype(float), n_units=3
    )
    settings = SamplerSection(chains=4, draws=2000, tune=1000, cores=2, seed=17, engine=engine)
    draws, diagnostics = Sampler(ShrinkageSpec(pooling="none"), settings, engine=engine).run(
        cells, seed=17
    )
    assert diagnostics.failures() == []
    rate = expit(draws["u"])
    for i in range(3):
        exact = stats.beta(1 + r[i], 1 + n[i] - r[i])
        for q in (0.025, 0.5, 0.975):
            # Monte Carlo tolerance: about 4 standard errors of a quantile from ~2,000 effective
            # draws.
            se = np.sqrt(q * (1 - q) / 2000) / exact.pdf(exact.ppf(q))
            assert abs(np.quantile(rate[:, i], q) - exact.ppf(q)) < 4 * se, (i, q)


def test_a_failed_fit_is_retried_once_with_safer_settings(monkeypatch):
    settings = SamplerSection(chains=4, draws=1000, tune=500, target_accept=0.9)
    sampler = Sampler(ShrinkageSpec(), settings)
    bad = Diagnostics(
        rhat_max=1.05, ess_bulk_min=900, divergences=2, chains=4, draws=1000, seconds=1.0
    )
    good = Diagnostics(
        rhat_max=1.001,
        ess_bulk_min=900,
        divergences=0,
        chains=4,
        draws=1000,
        seconds=1.0,
        retried=True,
    )
    calls, warned = [], []
    monkeypatch.setattr(
        Sampler,
        "run",
        lambda self, cells, seed, s=None: (
            calls.append((seed, s)),
            ({"ok": s is not None}, good if s else bad),
        )[1],
    )
    draws, diagnostics = sampler.run_checked(cells=None, seed=5, measure="m", warn=warned.append)
    assert draws == {"ok": True} and diagnostics.retried
    assert calls[0] == (5, None) and (calls[1][1].tune, calls[1][1].target_accept) == (1000, 0.99)
    assert (
        len(warned) == 1 and "retrying once" in warned[0] and "2 divergent transitions" in warned[0]
    )


def test_tail_ess_and_energy_checks_are_named():
    d = Diagnostics(
        rhat_max=1.0,
        ess_bulk_min=900,
        divergences=0,
        chains=4,
        draws=1000,
        seconds=1.0,
        ess_tail_min=200,
        bfmi_min=0.2,
    )
    assert d.failures() == ["smallest tail ESS 200 is below 400", "lowest E-BFMI 0.20 is below 0.3"]


def test_the_cheaper_exact_representation_is_chosen():
    from pipeline.shrinkage import curves
    from pipeline.shrinkage.model import CURVE_DEGREE, model_data

    assert CURVE_DEGREE == curves.DEGREE
    unit, offset, y = _patients()
    few = Cells.from_patients(unit, offset, y, 5)  # <= 20 cells: the cells themselves
    assert (
        "coef" not in model_data(ShrinkageSpec(), few)[0]
        and model_data(ShrinkageSpec(), few)[1] is None
    )
    rng = np.random.default_rng(1)
    # 400 distinct risks: curves
    many = Cells.from_patients(unit, offset + rng.normal(0, 0.1, len(unit)), y, 5)
    data, built = model_data(ShrinkageSpec(), many)
    assert "coef" in data and built is not None
