"""The fit stage: for every measure, the case-mix fit, its validation and the shrinkage fit.

:func:`fit_measures` reuses cached fits where the data and model settings are unchanged and
summarises each measure into a :class:`~pipeline.results.MeasureResult`. One measure's fit
(:func:`fit_measure`) is, in order: each unit's expected value at the benchmark (from a fitted
case-mix model, or from unit totals); the design of what small units are pulled towards; the
shrinkage fit; and the sensitivity fits (other priors for the between-unit SD, the case-mix model
without its social-risk factors, one common target instead of unit-level predictors).
"""

from __future__ import annotations

from pipeline.cache import Cache, cache_key, code_version
from pipeline.config import CycleConfig, MeasureSection, family_of
from pipeline.fit_steps import (
    Expected,
    FittedUnits,
    from_patients,
    from_unit_totals,
    pull_design,
    sampler_for,
    shrink,
)
from pipeline.formulas import without_terms
from pipeline.inputs.data import Cohort
from pipeline.progress import Reporter
from pipeline.results import MeasureFits, MeasureResult, PriorAlternative, summarise_measure
from pipeline.shrinkage.draws import evenly_thinned, unit_draws
from pipeline.shrinkage.model import PREDICTOR_PRIOR, Cells, ShrinkageSpec
from pipeline.shrinkage.sampling import (
    K_HAT_MAX,
    SENSITIVITY_SCALES,
    Sampler,
    reweight_tau,
    with_tau_scale,
)


def fit_measures(
    config: CycleConfig, cohort: Cohort, cache: Cache, reporter: Reporter
) -> list[MeasureResult]:
    """Every measure's fits (cached or fitted; one compiled model per likelihood), summarised."""
    units = FittedUnits.of(cohort)
    samplers: dict[str, Sampler] = {}
    results = []
    code = code_version()
    for i, measure in enumerate(config.measures):
        seed = config.sampler.seed + i
        fit_key = cache_key(
            "fit",
            code,
            cohort.sha256,
            cohort.unit_column,
            units.ids,
            _settings(config, measure),
            config.sampler,
            config.validation,
            seed,
            ShrinkageSpec(),
            PREDICTOR_PRIOR,
        )
        fits = cache.load(fit_key)
        if fits is None:
            fits = fit_measure(config, cohort, measure, units, samplers, seed, reporter)
            cache.store(fit_key, fits)
        else:
            reporter.stage(
                f"{measure.key}: data and model settings unchanged; reusing the cached fits"
            )
        for note in fits.casemix.warnings:
            reporter.warn(note)
        results.append(summarise_measure(config, measure, cohort.units, units.ids, fits))
    return results


def _settings(config: CycleConfig, measure: MeasureSection) -> tuple:
    """Everything of a measure's settings that changes its fits (part of the cache key)."""
    return (
        measure.type,
        measure.outcome,
        measure.casemix,
        family_of(measure),
        measure.missing,
        measure.expected_column,
        measure.summary,
        measure.social_risk,
        measure.risk_threshold,
        config.reporting.benchmark,
        tuple(measure.pull_towards),
    )


def fit_measure(
    config: CycleConfig,
    cohort: Cohort,
    measure: MeasureSection,
    units: FittedUnits,
    samplers: dict[str, Sampler],
    seed: int,
    reporter: Reporter,
) -> MeasureFits:
    """The case-mix fit, its validation, the shrinkage fit and the sensitivity fits of a measure."""
    if measure.summary:
        expected = from_unit_totals(config, cohort, measure, units, reporter)
    else:
        formula = measure.casemix
        expected = from_patients(config, cohort, measure, units, formula, seed, reporter)
    design = pull_design(measure, cohort, units, expected)
    cells = expected.cells.with_predictors(design.w if design is not None else None)
    sampler = sampler_for(samplers, expected.likelihood, design, config)
    draws, diagnostics = shrink(config, measure, sampler, cells, design, seed, reporter)
    sensitivity = prior_sensitivity(
        config, sampler, samplers, cells, draws, seed, measure.key, reporter
    )
    without = None
    if measure.social_risk:
        without = refit_without_social_risk(
            config, cohort, measure, units, samplers, seed, reporter
        )
    ratio_draws = unit_draws(cells, draws, likelihood=expected.likelihood, scale=expected.scale)
    plain = None
    if design is not None:
        plain = refit_common_target(config, measure, expected, samplers, seed, reporter)
    return MeasureFits(
        expected.counts,
        expected.casemix,
        ratio_draws,
        draws["tau"],
        diagnostics,
        expected.validation,
        without,
        sensitivity,
        design=design,
        beta=draws.get("beta"),
        without_predictors=plain,
        row_expected=expected.row_expected,
    )


def refit_without_social_risk(
    config: CycleConfig,
    cohort: Cohort,
    measure: MeasureSection,
    units: FittedUnits,
    samplers: dict[str, Sampler],
    seed: int,
    reporter: Reporter,
) -> MeasureFits:
    """The equity sensitivity: the same measure with its social-risk factors left out of the
    case-mix model (not validated; no sensitivity fits of its own)."""
    reduced = without_terms(measure.casemix, measure.social_risk)
    reporter.stage(
        f"{measure.key}: equity sensitivity: refitting without {', '.join(measure.social_risk)}"
    )
    expected = from_patients(config, cohort, measure, units, reduced, seed, reporter, check=False)
    design = pull_design(measure, cohort, units, expected)
    cells = expected.cells.with_predictors(design.w if design is not None else None)
    sampler = sampler_for(samplers, expected.likelihood, design, config)
    draws, diagnostics = shrink(config, measure, sampler, cells, design, seed, reporter)
    return MeasureFits(
        expected.counts,
        expected.casemix,
        unit_draws(cells, draws, likelihood=expected.likelihood, scale=expected.scale),
        draws["tau"],
        diagnostics,
        None,
        design=design,
        beta=draws.get("beta"),
    )


def refit_common_target(
    config: CycleConfig,
    measure: MeasureSection,
    expected: Expected,
    samplers: dict[str, Sampler],
    seed: int,
    reporter: Reporter,
) -> MeasureFits:
    """The target sensitivity: the shrinkage fit with every unit pulled towards one typical unit."""
    reporter.stage(
        f"{measure.key}: sensitivity: refitting with every unit pulled towards one typical unit"
    )
    sampler = sampler_for(samplers, expected.likelihood, None, config)
    draws, diagnostics = sampler.run_checked(expected.cells, seed, measure.key, reporter.warn)
    return MeasureFits(
        expected.counts,
        expected.casemix,
        unit_draws(expected.cells, draws, likelihood=expected.likelihood, scale=expected.scale),
        draws["tau"],
        diagnostics,
        expected.validation,
    )


def prior_sensitivity(
    config: CycleConfig,
    sampler: Sampler,
    samplers: dict[str, Sampler],
    cells: Cells,
    draws: dict,
    seed: int,
    measure_key: str,
    reporter: Reporter,
) -> tuple[PriorAlternative, ...]:
    """The posterior under a narrower and a wider tau prior: reweighted draws, or a refit when the
    weights are unreliable."""
    out = []
    likelihood = sampler.spec.likelihood
    tau = draws["tau"][evenly_thinned(len(draws["tau"]), 4000)]  # the draws unit_draws keeps
    base = sampler.spec.priors["tau"][1]["sigma"]
    for scale in SENSITIVITY_SCALES:
        log_weights, k_hat = reweight_tau(tau, scale * base, base)
        if k_hat <= K_HAT_MAX:
            out.append(PriorAlternative(scale * base, k_hat, "reweighted", log_weights, None))
            continue
        reporter.stage(
            f"{measure_key}: prior sensitivity: importance weights unreliable (k-hat {k_hat:.2f}); "
            f"refitting with tau ~ HalfNormal({scale * base:g})"
        )
        name = f"{likelihood}-predictors{sampler.spec.predictors}-tau{scale}"
        if name not in samplers:
            samplers[name] = Sampler(
                with_tau_scale(sampler.spec, scale * base),
                config.sampler,
                engine=config.sampler.engine,
            )
        refit, _ = samplers[name].run_checked(cells, seed, measure_key, reporter.warn)
        alternative = unit_draws(cells, refit, likelihood=likelihood)
        out.append(PriorAlternative(scale * base, k_hat, "refitted", None, alternative))
    return tuple(out)
