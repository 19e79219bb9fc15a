"""The results table: one row per (measure, unit), with everything a page or download shows.

Numbers stay numbers here; wording and formatting belong to ``pages``. Suppression of small
units happens here, once, so no later stage can leak a suppressed value.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from pipeline.casemix.benchmark import reference_rate
from pipeline.casemix.model import FAMILIES, CaseMixFit
from pipeline.casemix.validation import LABELS, Validation
from pipeline.config import CycleConfig, MeasureSection, family_for
from pipeline.disclosure import hide_small_counts, protect_units
from pipeline.grouping import group_units, rank_summary
from pipeline.inputs.targets import TargetDesign
from pipeline.shrinkage.draws import UnitDraws, evenly_thinned
from pipeline.shrinkage.model import ShrinkageSpec
from pipeline.shrinkage.sampling import (
    CONVERGENCE_LIMITS,
    K_HAT_MAX,
    RETRY_TARGET_ACCEPT,
    RETRY_TUNE_FACTOR,
    SENSITIVITY_SCALES,
    Diagnostics,
)

# Unit states, in our own words (the key is stored; the words are shown).
STATUS = {
    "reported": "Reported",
    "too_few": "Too few cases to report",
    "withheld": "Withheld to protect a smaller unit",
    "no_cases": "No cases this cycle",
}
# Where the credible interval of the adjusted rate lies relative to the benchmark.
POSITION = {
    "above": "Interval sits above the benchmark",
    "spans": "Interval spans the benchmark",
    "below": "Interval sits below the benchmark",
}
# The three groups, in our own words; the rule that assigns them is [reporting].grouping.
GROUPS = {
    "better": "Stands out as better",
    "typical": "In line with the benchmark",
    "worse": "Stands out as worse",
}


HISTORY_DRAWS = 1000  # draws kept per unit for comparing cycles


@dataclass(frozen=True)
class FitSettings:
    """How the fits are made, in the words the methods and model pages use (the site's one view of
    the fitting code's settings)."""

    sampler_checks: dict  # the convergence limits every fit must meet
    priors: list[str]  # one line per prior of the shrinkage model
    k_hat_max: float  # largest Pareto k-hat at which prior sensitivity reweights instead of refits
    families: dict  # case-mix family -> (the model in words, the word for its effect ratio)
    metric_labels: dict  # validation metric -> its label
    retry_tune_factor: float  # the one retry's warm-up, as a multiple of the first fit's
    retry_target_accept: float
    prior_scales: tuple[float, ...]  # the other priors for tau, as multiples of its scale


FIT_SETTINGS = FitSettings(
    CONVERGENCE_LIMITS,
    ShrinkageSpec().describe(),
    K_HAT_MAX,
    FAMILIES,
    LABELS,
    RETRY_TUNE_FACTOR,
    RETRY_TARGET_ACCEPT,
    SENSITIVITY_SCALES,
)


@dataclass(frozen=True)
class MeasureFits:
    """Everything fitted for one measure (what the cache keeps)."""

    # per fitted unit code: cases, observed, expected, variance (of observed at the benchmark)
    counts: pd.DataFrame
    casemix: CaseMixFit
    draws: UnitDraws
    tau: np.ndarray
    diagnostics: Diagnostics
    validation: Validation | None  # None for unit-level input
    without_social_risk: MeasureFits | None = None  # the equity sensitivity refit
    sensitivity: tuple = ()  # PriorAlternative per alternative between-unit prior
    # targets.TargetDesign of the unit-level predictors (None: one common target)
    design: TargetDesign | None = None
    # (draws, terms) their coefficients per standard deviation, on the link scale
    beta: np.ndarray | None = None
    # the same fit with one common target (sensitivity)
    without_predictors: MeasureFits | None = None
    # per patient row used: expected value at the benchmark (unit previews; None: unit totals)
    row_expected: np.ndarray | None = None


@dataclass(frozen=True)
class PriorAlternative:
    """The posterior under another prior for tau: importance weights on the same draws, or a
    refit."""

    scale: float  # HalfNormal scale of tau in the alternative
    k_hat: float  # Pareto k of the smoothed importance weights (Vehtari et al. 2024, JMLR 25:72)
    method: str  # "reweighted" or "refitted" (when k_hat > 0.7)
    log_weights: np.ndarray | None  # per kept draw, normalised (reweighted)
    draws: UnitDraws | None  # refitted


@dataclass(frozen=True)
class MeasureResult:
    """One measure's fitted results and the figures that describe the fits."""

    measure: MeasureSection
    casemix: CaseMixFit
    diagnostics: Diagnostics
    network_rate: float  # binary: the network's observed rate; continuous: the network's mean
    # the reference rate or mean R of benchmark.py: the adjusted value of a unit with ratio 1
    benchmark: float
    tau: tuple[float, float, float]  # posterior median, lower, upper of the between-unit SD
    table: pd.DataFrame  # full internal table, one row per unit in the unit table
    # thinned posterior draws of the risk-standardised rate, one column per fitted unit
    rsr_draws: pd.DataFrame
    validation: Validation | None = None
    # reported units: position with and without the social-risk factors
    equity: pd.DataFrame | None = None
    # per alternative prior: {"scale", "k_hat", "method", "changed": [(unit, group now, group
    # then)]}
    sensitivity: tuple = ()
    # adjusted value of the typical unit (mu), what small units are pulled towards
    typical: float = float("nan")
    # with unit-level predictors of the target: terms, groups with and without, units that change
    targets: dict | None = None
    # per patient row used (casemix.used): expected value at the benchmark; None for unit totals
    row_expected: np.ndarray | None = None

    @property
    def model_validation(self) -> Validation:
        """The case-mix model's validation (only a fitted case-mix model has one)."""
        if self.validation is None:
            raise ValueError(f"{self.measure.key}: expected values were supplied, none validated")
        return self.validation


def summarise_measure(
    config: CycleConfig,
    measure: MeasureSection,
    units: pd.DataFrame,
    unit_ids: list[str],
    fits: MeasureFits,
) -> MeasureResult:
    """Posterior summaries per unit for one measure (``fits.counts`` in the order of
    ``unit_ids``)."""
    result = _summarise(config, measure, units, unit_ids, fits)
    if fits.without_predictors is not None:
        result = replace(result, targets=_targets(config, measure, units, unit_ids, fits, result))
    if fits.without_social_risk is None:
        return result
    other = _summarise(config, measure, units, unit_ids, fits.without_social_risk).table.set_index(
        "unit_id"
    )
    mine = result.table[result.table["status"] == "reported"].set_index("unit_id")
    equity = pd.DataFrame(
        {
            "unit_name": mine["unit_name"],
            "position_with": mine["position"],
            "rsr_with": mine["rsr_median"],
            "position_without": other.loc[mine.index, "position"],
            "rsr_without": other.loc[mine.index, "rsr_median"],
        }
    )
    equity["changed"] = equity["position_with"] != equity["position_without"]
    return replace(result, equity=equity.reset_index())


def _targets(
    config: CycleConfig,
    measure: MeasureSection,
    units: pd.DataFrame,
    unit_ids: list[str],
    fits: MeasureFits,
    result: MeasureResult,
) -> dict:
    """The unit-level predictors of what units are pulled towards: their effects, and the groups
    with and without them.

    Each term's effect is exp(beta) per standard deviation of the predictor: the factor by which the
    odds (or the mean) of the unit a small unit is pulled towards changes (median and interval).
    """
    level = config.reporting.interval
    lo_q, hi_q = (1 - level) / 2, 1 - (1 - level) / 2
    design, beta, common = fits.design, fits.beta, fits.without_predictors
    if design is None or beta is None or common is None:
        raise ValueError(f"{measure.key}: fitted with one common target, no predictors")
    effect = np.exp(beta)
    terms = [
        {
            "term": term,
            "mean": float(design.centre[k]),
            "sd": float(design.spread[k]),
            "effect_median": float(np.median(effect[:, k])),
            "effect_lower": float(np.quantile(effect[:, k], lo_q)),
            "effect_upper": float(np.quantile(effect[:, k], hi_q)),
        }
        for k, term in enumerate(design.columns)
    ]
    other = _summarise(config, measure, units, unit_ids, common).table.set_index("unit_id")
    mine = result.table[result.table["status"] == "reported"].set_index("unit_id")
    compare = pd.DataFrame(
        {
            "unit_name": mine["unit_name"],
            "group_with": mine["group"],
            "group_without": other.loc[mine.index, "group"],
            "rsr_with": mine["rsr_median"],
            "rsr_without": other.loc[mine.index, "rsr_median"],
        }
    )
    changed = compare[compare["group_with"] != compare["group_without"]].reset_index()
    count = {
        g: {
            "with": int((compare["group_with"] == g).sum()),
            "without": int((compare["group_without"] == g).sum()),
        }
        for g in GROUPS
    }
    return {
        "terms": terms,
        "groups": count,
        "changed": changed,
        "tau_without": float(np.median(common.tau)),
    }


def _summarise(
    config: CycleConfig,
    measure: MeasureSection,
    units: pd.DataFrame,
    unit_ids: list[str],
    fits: MeasureFits,
) -> MeasureResult:
    """One measure's results table and summaries from its fits (the disclosure rules applied)."""
    level = config.reporting.interval
    lo_q, hi_q = (1 - level) / 2, 1 - (1 - level) / 2
    network_rate = fits.casemix.events / fits.casemix.patients
    # benchmark.py: the one definition
    benchmark = reference_rate(config.reporting.benchmark, measure.type, network_rate)
    rsr = fits.draws.ratio * benchmark
    table = _unit_table(config, measure, units, unit_ids, fits, rsr, benchmark, (lo_q, hi_q))
    protect_units(table, config.reporting.minimum_cases)
    table.loc[table["status"] != "reported", "position"] = ""
    where = table["status"] == "reported"
    position_of = {u: i for i, u in enumerate(unit_ids)}
    columns = np.array([position_of[u] for u in table.loc[where, "unit_id"]], dtype=int)
    rule = (config.reporting.grouping, config.reporting.grouping_probability, lo_q, hi_q)
    interval = (
        table.loc[where, "rsr_lower"].to_numpy(float),
        table.loc[where, "rsr_upper"].to_numpy(float),
    )
    groups, other = group_units(
        rsr[:, columns], benchmark, measure.better, *rule, interval=interval
    )
    table["group"], table["prob_other_side"] = "", np.nan
    table.loc[where, "group"], table.loc[where, "prob_other_side"] = groups, other
    table[["rank_median", "rank_lower", "rank_upper"]] = np.nan
    table.loc[where, ["rank_median", "rank_lower", "rank_upper"]] = rank_summary(
        rsr[:, columns], measure.better, lo_q, hi_q
    )
    table["own_weight"] = _own_weight(table["unit_id"], unit_ids, fits)
    # continuous: minimum_cases covers it
    threshold = config.reporting.hide_counts_below if family_for(measure).counts_events else 0
    hide_small_counts(table, threshold, config.reporting.minimum_cases)
    names = table.loc[where, "unit_name"].to_numpy()
    changes = _prior_changes(fits, rsr, columns, benchmark, measure.better, rule, groups, names)
    tau = fits.tau
    return MeasureResult(
        measure=measure,
        casemix=fits.casemix,
        diagnostics=fits.diagnostics,
        network_rate=network_rate,
        benchmark=benchmark,
        typical=float(np.median(fits.draws.typical)) * benchmark
        if fits.draws.typical is not None
        else float("nan"),
        tau=(float(np.median(tau)), float(np.quantile(tau, lo_q)), float(np.quantile(tau, hi_q))),
        table=table,
        rsr_draws=pd.DataFrame(rsr[evenly_thinned(len(rsr), HISTORY_DRAWS)], columns=unit_ids),
        validation=fits.validation,
        sensitivity=tuple(changes),
        row_expected=fits.row_expected,
    )


def _unit_table(
    config: CycleConfig,
    measure: MeasureSection,
    units: pd.DataFrame,
    unit_ids: list[str],
    fits: MeasureFits,
    rsr: np.ndarray,
    benchmark: float,
    quantiles: tuple[float, float],
) -> pd.DataFrame:
    """One row per unit of the unit table: its counts, posterior summaries, status and position."""
    lo_q, hi_q = quantiles
    counts, draws = fits.counts, fits.draws
    fitted = pd.DataFrame(
        {
            "unit_id": unit_ids,
            "cases": counts["cases"].to_numpy(),
            "observed": counts["observed"].to_numpy(),
            "expected": counts["expected"].to_numpy(),
            # of the observed total at the benchmark: the funnel's null (not published)
            "variance": counts["variance"].to_numpy(),
            "ratio_median": np.median(draws.ratio, axis=0),
            "ratio_lower": np.quantile(draws.ratio, lo_q, axis=0),
            "ratio_upper": np.quantile(draws.ratio, hi_q, axis=0),
            "rsr_median": np.median(rsr, axis=0),
            "rsr_lower": np.quantile(rsr, lo_q, axis=0),
            "rsr_upper": np.quantile(rsr, hi_q, axis=0),
            "prob_above_benchmark": (rsr > benchmark).mean(axis=0),
            "prob_below_benchmark": (rsr < benchmark).mean(axis=0),
            "effect_median": np.median(draws.effect, axis=0),
            "effect_lower": np.quantile(draws.effect, lo_q, axis=0),
            "effect_upper": np.quantile(draws.effect, hi_q, axis=0),
        }
    )
    table = (
        units.rename(columns={"name": "unit_name", "kind": "unit_kind"})
        .rename_axis("unit_id")
        .reset_index()
    )
    table = table.merge(fitted, on="unit_id", how="left")
    table.insert(0, "measure", measure.key)
    table["cases"] = table["cases"].fillna(0).astype(int)
    table["raw_rate"] = table["observed"] / table["cases"].where(table["cases"] > 0)
    table["oe_ratio"] = table["observed"] / table["expected"]
    table["status"] = np.select(
        [table["cases"] == 0, table["cases"] < config.reporting.minimum_cases],
        ["no_cases", "too_few"],
        "reported",
    )
    table["position"] = np.select(
        [
            table["rsr_lower"] > benchmark,
            table["rsr_upper"] < benchmark,
            table["status"] == "reported",
        ],
        ["above", "below", "spans"],
        "",
    )
    return table


def _own_weight(table_ids: pd.Series, unit_ids: list[str], fits: MeasureFits) -> pd.Series | float:
    """Share of each unit's estimate that rests on its own patients: tau^2 / (tau^2 + se^2)."""
    if fits.draws.se is None:
        return np.nan
    tau_median = float(np.median(fits.tau))
    weight = tau_median**2 / (tau_median**2 + fits.draws.se**2)
    return table_ids.map(dict(zip(unit_ids, weight, strict=True)))


def _prior_changes(
    fits: MeasureFits,
    rsr: np.ndarray,
    columns: np.ndarray,
    benchmark: float,
    better: str,
    rule: tuple[str, float, float, float],
    groups: np.ndarray,
    names: np.ndarray,
) -> list[dict]:
    """Per alternative prior for tau: the reported units whose group it changes."""
    changes = []
    for alt in fits.sensitivity:
        alt_rsr = (alt.draws.ratio * benchmark) if alt.draws is not None else rsr
        weights = None if alt.log_weights is None else np.exp(alt.log_weights)
        alt_groups, _ = group_units(alt_rsr[:, columns], benchmark, better, *rule, weights=weights)
        changed = [
            (names[i], groups[i], alt_groups[i]) for i in np.flatnonzero(alt_groups != groups)
        ]
        changes.append(
            {"scale": alt.scale, "k_hat": alt.k_hat, "method": alt.method, "changed": changed}
        )
    return changes
