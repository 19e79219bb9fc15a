"""A fake sampler for quick tests: posterior draws from a normal approximation, in milliseconds.

It stands in for :meth:`pipeline.shrinkage.sampling.Sampler.run` (the only place that samples), so
every stage after the shrinkage fit (results, disclosure, figures, pages, render, history) runs
as in a real cycle, on draws that behave like a posterior but cost nothing to make. Its numbers
are not the model's: tests that check numbers against a reference use the real sampler (marked
``slow``).

Each unit's intercept (relative to its offsets at the benchmark) is estimated from its own cells,
log((O + 0.5) / (E + 0.5)) with standard error 1 / sqrt(O + 0.5), and pooled towards their
precision-weighted mean with a method-of-moments between-unit SD (the normal-normal model,
common practice, no source): draws of mu, tau and each unit's u from that approximation.
"""

from __future__ import annotations

import numpy as np
from scipy.special import expit

from pipeline.shrinkage.model import Cells, rough_tau
from pipeline.shrinkage.sampling import Diagnostics


def fake_run(self, cells: Cells, seed: int, settings=None):
    """Drop-in for ``Sampler.run``: (draws, diagnostics) with the keys the real one returns."""
    s = settings or self.settings
    n_draws = s.chains * s.draws
    rng = np.random.default_rng(seed)
    k = cells.n_units
    if self.spec.likelihood == "binomial":
        expected = np.bincount(cells.unit, weights=cells.n * expit(cells.offset), minlength=k)
    else:
        expected = np.bincount(cells.unit, weights=np.exp(cells.offset), minlength=k)
    observed = np.bincount(cells.unit, weights=cells.r, minlength=k)
    seen = np.bincount(cells.unit, weights=cells.n, minlength=k) > 0
    if self.spec.likelihood not in ("binomial", "poisson"):  # continuous: no counts to use
        observed, expected = np.where(seen, 100.0, 0.0), np.where(seen, 100.0, 0.0)
    estimate = np.where(seen, np.log((observed + 0.5) / (expected + 0.5)), np.nan)
    se = np.where(seen, 1 / np.sqrt(observed + 0.5), np.inf)
    tau = rough_tau(estimate, se)
    weight = np.where(seen, 1 / (se**2 + tau**2), 0.0)
    mu = float(np.sum(weight * np.nan_to_num(estimate)) / max(weight.sum(), 1e-12))
    precision = np.where(seen, 1 / se**2, 0.0) + 1 / tau**2
    mean = (np.where(seen, np.nan_to_num(estimate) / se**2, 0.0) + mu / tau**2) / precision
    mu_draws = rng.normal(mu, 0.02, n_draws)
    a = rng.normal(mean, 1 / np.sqrt(precision), (n_draws, k))
    draws = {
        "mu": mu_draws,
        "tau": np.abs(rng.normal(tau, 0.1 * tau, n_draws)),
        "u": a - mu_draws[:, None],
        "curves": None,
    }
    if self.spec.predictors:
        draws["beta"] = rng.normal(0.0, 0.05, (n_draws, self.spec.predictors))
        draws["pull"] = np.zeros((n_draws, k))
    diagnostics = Diagnostics(
        rhat_max=1.0,
        ess_bulk_min=float(n_draws),
        divergences=0,
        chains=s.chains,
        draws=s.draws,
        seconds=0.0,
        ess_tail_min=float(n_draws),
        bfmi_min=1.0,
        retried=settings is not None,
    )
    return draws, diagnostics
