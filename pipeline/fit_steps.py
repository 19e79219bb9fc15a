"""The steps of one measure's fit: each unit's expected value at the benchmark (from a fitted
case-mix model or from unit totals), the design of what small units are pulled towards, and the
shrinkage fit itself, with one compiled model per likelihood and number of predictor terms.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipeline.casemix.benchmark import (
    benchmark_offset,
    null_variance,
    reference_rate,
    scaled_totals,
)
from pipeline.casemix.model import CaseMixFit, fit_with_design, unit_summary_fit
from pipeline.casemix.validation import Validation, validate
from pipeline.config import CycleConfig, MeasureSection, family_for
from pipeline.inputs.data import Cohort
from pipeline.inputs.targets import TargetDesign
from pipeline.inputs.targets import design as target_design
from pipeline.progress import Reporter
from pipeline.shrinkage.model import Cells, ShrinkageSpec
from pipeline.shrinkage.sampling import Diagnostics, Sampler


@dataclass(frozen=True)
class FittedUnits:
    """The units with data for at least one measure, in unit-table order, and each row's unit."""

    ids: list[str]
    codes: np.ndarray  # per cohort row: its unit's position in ``ids``

    @classmethod
    def of(cls, cohort: Cohort) -> FittedUnits:
        present = cohort.units_with_cases()
        ids = [u for u in cohort.units.index if u in present]
        codes = pd.Categorical(cohort.rows[cohort.unit_column], categories=ids).codes
        return cls(ids, codes.astype(np.int64))


@dataclass
class Expected:
    """What the shrinkage fit needs from the case-mix stage of one measure."""

    casemix: CaseMixFit
    cells: Cells  # the data of the shrinkage fit, offsets at the benchmark
    likelihood: str
    counts: pd.DataFrame  # per fitted unit code: cases, observed, expected, variance
    scale: float  # continuous measures: multiplies ratios to the benchmark's scale
    validation: Validation | None
    mean_risk: np.ndarray | None  # per unit: its patients' mean offset (no patients: None)
    # per patient row used (in cohort order): expected value at the benchmark (summed: counts)
    row_expected: np.ndarray | None = None


def from_unit_totals(
    config: CycleConfig,
    cohort: Cohort,
    measure: MeasureSection,
    units: FittedUnits,
    reporter: Reporter,
) -> Expected:
    """Unit-level input: each unit's supplied expected total, brought to the benchmark's total."""
    reporter.stage(f"{measure.key}: unit-level input; no case-mix fit")
    n_units = len(units.ids)
    summary = cohort.unit_totals(measure.key)
    position_of = {u: i for i, u in enumerate(units.ids)}
    unit_codes = np.array([position_of[u] for u in summary.index], dtype=np.int64)
    casemix = unit_summary_fit(measure, summary)
    rate = reference_rate(
        config.reporting.benchmark, measure.type, casemix.events / casemix.patients
    )
    expected, _ = scaled_totals(summary["expected"].to_numpy(), rate * casemix.patients)
    counts = pd.DataFrame(
        {
            "cases": summary["cases"].to_numpy(),
            "observed": summary["observed"].to_numpy(),
            "expected": expected,
            "variance": expected,
        },
        index=unit_codes,
    ).reindex(range(n_units))
    cells = Cells.from_units(unit_codes, summary["observed"].to_numpy(), expected, n_units)
    return Expected(casemix, cells, "poisson", counts, 1.0, None, None)


def from_patients(
    config: CycleConfig,
    cohort: Cohort,
    measure: MeasureSection,
    units: FittedUnits,
    formula: str,
    seed: int,
    reporter: Reporter,
    check: bool = True,
) -> Expected:
    """Patient-level input: the case-mix fit of ``formula``, validated when ``check``, and each
    patient's expected value at the benchmark."""
    reporter.stage(f"{measure.key}: case-mix fit ({formula})")
    n_units = len(units.ids)
    casemix, x, y = fit_with_design(measure, cohort.rows, units.codes, formula)
    casemix.exclusions["by_unit"] = {
        units.ids[c]: n for c, n in casemix.exclusions.get("by_unit", {}).items()
    }
    used_codes = units.codes[casemix.used]
    validation = (
        validation_of(config, measure, casemix, x, y, used_codes, seed, reporter) if check else None
    )
    likelihood = family_for(measure).likelihood
    offset, expected, scale = benchmark_offset(
        config.reporting.benchmark, measure, casemix, y, used_codes
    )
    cells = (
        Cells.from_patients(used_codes, offset, y, n_units)
        if likelihood == "binomial"
        else Cells.from_continuous(used_codes, offset, y, n_units, likelihood)
    )
    per_patient = pd.DataFrame(
        {
            "code": used_codes,
            "y": y,
            "e": expected,
            "v": null_variance(measure, casemix, y, expected),
        }
    )
    counts = (
        per_patient.groupby("code")
        .agg(
            cases=("y", "size"), observed=("y", "sum"), expected=("e", "sum"), variance=("v", "sum")
        )
        .reindex(range(n_units))
    )
    # each unit's mean offset: its patients' average risk on the link scale (the case_mix target)
    mean_risk = pd.Series(offset).groupby(used_codes).mean().reindex(range(n_units)).to_numpy(float)
    return Expected(casemix, cells, likelihood, counts, scale, validation, mean_risk, expected)


def validation_of(
    config: CycleConfig,
    measure: MeasureSection,
    casemix: CaseMixFit,
    x: np.ndarray | None,
    y: np.ndarray,
    used_codes: np.ndarray,
    seed: int,
    reporter: Reporter,
) -> Validation:
    """The case-mix model's in-sample and cross-validated metrics."""
    threshold = (
        casemix.events / casemix.patients
        if measure.risk_threshold == "network"
        else float(measure.risk_threshold)
    )
    v = config.validation
    reporter.stage(
        f"{measure.key}: validating the case-mix model ({v.folds}-fold cross-validation)"
    )
    binary = family_for(measure).counts_events
    return validate(casemix, binary, y, x, used_codes, v.folds, v.deciles, threshold, seed)


def pull_design(
    measure: MeasureSection, cohort: Cohort, units: FittedUnits, expected: Expected
) -> TargetDesign | None:
    """The unit-level predictors of what small units are pulled towards (None: one target)."""
    if not measure.pull_towards:
        return None
    cases = expected.counts["cases"].fillna(0).to_numpy(float)
    return target_design(
        tuple(measure.pull_towards),
        units.ids,
        cases > 0,
        cases,
        expected.mean_risk,
        cohort.units["kind"],
        cohort.attributes,
    )


def shrink(
    config: CycleConfig,
    measure: MeasureSection,
    sampler: Sampler,
    cells: Cells,
    design: TargetDesign | None,
    seed: int,
    reporter: Reporter,
) -> tuple[dict, Diagnostics]:
    """The shrinkage fit of one measure's cells: (posterior draws, diagnostics)."""
    s = config.sampler
    terms = (
        f" with {len(design.columns)} predictor term(s) of what units are pulled towards"
        if design is not None
        else ""
    )
    reporter.stage(
        f"{measure.key}: shrinkage fit ({sampler.spec.likelihood}{terms}) on {len(cells.n):,} "
        "cells "
        f"({s.chains} chains x {s.draws} draws, {s.engine})"
    )
    draws, diagnostics = sampler.run_checked(cells, seed, measure.key, reporter.warn)
    reporter.stage(
        f"{measure.key}: sampled in {diagnostics.seconds:.1f} s; R-hat max "
        f"{diagnostics.rhat_max:.3f}, "
        f"bulk ESS min {diagnostics.ess_bulk_min:.0f}, divergences {diagnostics.divergences}"
    )
    return draws, diagnostics


def sampler_for(
    samplers: dict[str, Sampler], likelihood: str, design: TargetDesign | None, config: CycleConfig
) -> Sampler:
    """One sampler (one compiled model) per likelihood and number of predictor terms."""
    p = 0 if design is None else len(design.columns)
    name = likelihood if p == 0 else f"{likelihood}-predictors{p}"
    if name not in samplers:
        samplers[name] = Sampler(
            ShrinkageSpec(likelihood=likelihood, predictors=p),
            config.sampler,
            engine=config.sampler.engine,
        )
    return samplers[name]
