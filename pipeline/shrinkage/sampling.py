"""Running the shrinkage fit: sampling, diagnostics with one safer retry, and prior sensitivity.

:class:`Sampler` compiles the PyMC model of a :class:`~pipeline.shrinkage.model.ShrinkageSpec` once
per cycle (nutpie) and samples every measure's data with it, or uses PyMC's own NUTS. Every fit is
checked against ``CONVERGENCE_LIMITS``; a failed fit is run once more with :func:`safer` settings
and then stops the cycle. Prior sensitivity reweights the same draws to a narrower and a wider prior
for the between-unit SD (Pareto-smoothed importance sampling), or refits when the weights are
unreliable.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from pipeline.config import SamplerSection
from pipeline.errors import FitError
from pipeline.shrinkage.model import Cells, ShrinkageSpec, build_model, model_data

# Diagnostic limits (Vehtari et al. 2021, Bayesian Analysis 16:667: R-hat below 1.01 and bulk
# and tail effective sample sizes of at least 100 per chain; divergences must be absent; an
# E-BFMI below 0.3 flags poor exploration of the energy distribution (Betancourt 2016,
# arXiv:1604.00695; the 0.3 threshold is common practice, no source)).
CONVERGENCE_LIMITS = {
    "rhat_max": 1.01,
    "ess_bulk_per_chain_min": 100,
    "ess_tail_per_chain_min": 100,
    "divergences_max": 0,
    "bfmi_min": 0.3,
}


LOW_RANK_MAX_UNITS = 100  # nutpie's low-rank mass matrix up to this many units, diagonal above


@dataclass(frozen=True)
class Diagnostics:
    rhat_max: float
    ess_bulk_min: float
    divergences: int
    chains: int
    draws: int
    seconds: float
    ess_tail_min: float = float("inf")
    bfmi_min: float = float("inf")
    retried: bool = False  # True when the first fit failed its checks and this is the safer refit

    def failures(self) -> list[str]:
        out = []
        if not self.rhat_max <= CONVERGENCE_LIMITS["rhat_max"]:
            out.append(
                f"largest R-hat {self.rhat_max:.3f} is above {CONVERGENCE_LIMITS['rhat_max']}"
            )
        if not self.ess_bulk_min >= CONVERGENCE_LIMITS["ess_bulk_per_chain_min"] * self.chains:
            out.append(
                f"smallest bulk ESS {self.ess_bulk_min:.0f} is below "
                f"{CONVERGENCE_LIMITS['ess_bulk_per_chain_min'] * self.chains}"
            )
        if not self.ess_tail_min >= CONVERGENCE_LIMITS["ess_tail_per_chain_min"] * self.chains:
            out.append(
                f"smallest tail ESS {self.ess_tail_min:.0f} is below "
                f"{CONVERGENCE_LIMITS['ess_tail_per_chain_min'] * self.chains}"
            )
        if self.divergences > CONVERGENCE_LIMITS["divergences_max"]:
            out.append(f"{self.divergences} divergent transitions")
        if not self.bfmi_min >= CONVERGENCE_LIMITS["bfmi_min"]:
            out.append(
                f"lowest E-BFMI {self.bfmi_min:.2f} is below {CONVERGENCE_LIMITS['bfmi_min']}"
            )
        return out


# The one retry after failed checks: this many times the warm-up, and at least this target
# acceptance (smaller steps).
RETRY_TUNE_FACTOR = 2
RETRY_TARGET_ACCEPT = 0.99


def safer(settings: SamplerSection) -> SamplerSection:
    """Settings for the one retry after failed checks: more warm-up, smaller steps."""
    return replace(
        settings,
        tune=settings.tune * RETRY_TUNE_FACTOR,
        target_accept=max(settings.target_accept, RETRY_TARGET_ACCEPT),
    )


class Sampler:
    """Compiles the model once per cycle and fits every measure's cells with it."""

    def __init__(self, spec: ShrinkageSpec, settings: SamplerSection, engine: str = "nutpie"):
        self.spec, self.settings, self.engine = spec, settings, engine
        self._compiled: dict[tuple, Any] = {}  # (units, data names) -> compiled model

    def run(self, cells: Cells, seed: int, settings: SamplerSection | None = None):
        """Sample the posterior for ``cells``; return (posterior draws, diagnostics)."""
        s = settings or self.settings
        start = time.perf_counter()
        data, curves = model_data(self.spec, cells)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            idata = self._sample(cells, data, seed, s)
            diagnostics = _diagnostics(idata, self.spec.sampled, s, start, settings is not None)
        draws = posterior_draws(
            self.spec, idata.posterior, cells.n_units, data.get("centred"), data.get("w")
        )
        return {**draws, "curves": curves}, diagnostics

    def _sample(self, cells: Cells, data: dict, seed: int, s: SamplerSection):
        """The posterior of the model with ``data``, from nutpie (compiled once) or PyMC."""
        if self.engine == "nutpie":
            import nutpie

            shape = (cells.n_units, tuple(sorted(data)), self.spec.predictors)
            if shape not in self._compiled:  # compile once per cycle and kind of data
                self._compiled[shape] = nutpie.compile_pymc_model(
                    build_model(self.spec, cells, data)
                )
            compiled = self._compiled[shape].with_data(**data)
            return nutpie.sample(
                compiled,
                draws=s.draws,
                tune=s.tune,
                chains=s.chains,
                cores=s.cores,
                seed=seed,
                target_accept=s.target_accept,
                progress_bar=False,
                # Low-rank adaptation follows the mu-versus-units correlation; its own cost grows
                # with the number of units (DEVELOPERS.md, "Sampler").
                low_rank_modified_mass_matrix=cells.n_units <= LOW_RANK_MAX_UNITS,
            )
        import pymc as pm

        with build_model(self.spec, cells, data):
            return pm.sample(
                draws=s.draws,
                tune=s.tune,
                chains=s.chains,
                cores=s.cores,
                random_seed=seed,
                target_accept=s.target_accept,
                progressbar=False,
                compute_convergence_checks=False,
            )

    def run_checked(self, cells: Cells, seed: int, measure: str, warn=lambda text: None):
        """:meth:`run`; if the checks fail, warn and run once more with :func:`safer` settings; then
        raise."""
        draws, diagnostics = self.run(cells, seed)
        if diagnostics.failures():
            warn(
                f"{measure}: the shrinkage fit failed its checks "
                f"({'; '.join(diagnostics.failures())}); retrying once with "
                "twice the warm-up and target acceptance 0.99"
            )
            draws, diagnostics = self.run(cells, seed + 1_000_003, safer(self.settings))
            if diagnostics.failures():
                raise fit_failed(measure, diagnostics)
        return draws, diagnostics


def _diagnostics(
    idata, names: list[str], s: SamplerSection, start: float, retried: bool
) -> Diagnostics:
    """R-hat, bulk and tail ESS, divergences and E-BFMI of a fit (ArviZ); the time since
    ``start`` (a ``time.perf_counter()`` reading)."""
    import arviz as az

    rhat = az.rhat(idata, var_names=names)
    ess = az.ess(idata, var_names=names, method="bulk")
    tail = az.ess(idata, var_names=names, method="tail")
    bfmi = az.bfmi(idata)
    return Diagnostics(
        rhat_max=float(max(rhat[v].max() for v in names)),
        ess_bulk_min=float(min(ess[v].min() for v in names)),
        divergences=int(idata.sample_stats["diverging"].sum()),
        chains=s.chains,
        draws=s.draws,
        seconds=time.perf_counter() - start,
        ess_tail_min=float(min(tail[v].min() for v in names)),
        bfmi_min=float(np.min(bfmi)),
        retried=retried,
    )


def posterior_draws(
    spec: ShrinkageSpec, post, n_units: int, centred: np.ndarray | None, w: np.ndarray | None = None
) -> dict[str, np.ndarray]:
    """Flatten chains: mu (draws,), tau (draws,), u (draws, units) with intercept = mu + u; with
    unit-level predictors also beta (draws, predictors) and pull (draws, units) = w . beta, so that
    a unit's prior mean is mu + pull and u - pull is its departure from units like it."""
    if spec.pooling == "beta":
        alpha, beta = post["alpha"].values.reshape(-1), post["beta"].values.reshape(-1)
        return {
            "alpha": alpha,
            "beta": beta,
            "mu": np.log(alpha / beta),
            "tau": np.full(len(alpha), np.nan),
            "u": np.zeros((len(alpha), n_units)),
        }
    if spec.pooling == "partial":
        if centred is None:
            raise ValueError("partial pooling needs each unit's parameterisation (centred)")
        mu = post["mu"].values.reshape(-1)
        tau = post["tau"].values.reshape(-1)
        v = post["v"].values.reshape(-1, n_units)
        if spec.predictors:
            beta = post["beta"].values.reshape(-1, spec.predictors)
            pull = beta @ np.asarray(w, float).T
            u = np.where(centred.astype(bool), v - mu[:, None], pull + tau[:, None] * v)
            return {"mu": mu, "tau": tau, "u": u, "beta": beta, "pull": pull}
        u = np.where(centred.astype(bool), v - mu[:, None], tau[:, None] * v)
    else:  # no common mean: the reference intercept is 0 and each unit's own intercept is u
        u = post["a"].values.reshape(-1, n_units)
        mu, tau = np.zeros(len(u)), np.full(len(u), np.inf)
    return {"mu": mu, "tau": tau, "u": u}


# Prior sensitivity: the between-unit SD prior made half and twice as wide (HalfNormal scales).
SENSITIVITY_SCALES = (0.5, 2.0)
# above this, importance weights are unreliable and the fit is redone (Vehtari et al. 2024, JMLR
# 25:72)
K_HAT_MAX = 0.7


def with_tau_scale(spec: ShrinkageSpec, scale: float) -> ShrinkageSpec:
    """The same spec with tau ~ HalfNormal(scale)."""
    return ShrinkageSpec(
        priors={**spec.priors, "tau": ("HalfNormal", {"sigma": scale})},
        pooling=spec.pooling,
        likelihood=spec.likelihood,
        predictors=spec.predictors,
    )


def reweight_tau(tau: np.ndarray, scale: float, base: float = 1.0) -> tuple[np.ndarray, float]:
    """Pareto-smoothed importance log-weights that turn tau ~ HalfNormal(base) draws into
    HalfNormal(scale) ones, and k-hat."""
    import arviz as az

    log_ratio = np.log(base / scale) - tau**2 / (2 * scale**2) + tau**2 / (2 * base**2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        smoothed, k_hat = az.psislw(log_ratio)
    return np.asarray(smoothed), float(k_hat)


def fit_failed(measure: str, diagnostics: Diagnostics) -> FitError:
    reasons = "; ".join(diagnostics.failures())
    return FitError(
        f"measure '{measure}': the shrinkage fit did not pass its checks "
        f"({reasons}){', also on the retry with safer settings' if diagnostics.retried else ''}. "
        "Nothing was published. Try more warm-up draws ([sampler].tune) or a higher "
        "[sampler].target_accept, then run the cycle again."
    )
