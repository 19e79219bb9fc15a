"""The results table: one row per (measure, unit), with everything a page or download shows.

Numbers stay numbers here; wording and formatting belong to ``pages``. Suppression of small
units happens here, once, so no later stage can leak a suppressed value.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from pipeline.casemix.benchmark import reference_rate
from pipeline.casemix.model import FAMILIES, CaseMixFit
from pipeline.casemix.validation import LABELS, Validation
from pipeline.config import CycleConfig, MeasureSection
from pipeline.disclosure import hide_small_counts, protect_units
from pipeline.inputs.targets import TargetDesign
from pipeline.shrinkage.model import ShrinkageSpec, UnitDraws, thin
from pipeline.shrinkage.sampling import K_HAT_MAX, LIMITS, Diagnostics

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
NUMERIC_PUBLIC = [
    "cases",
    "observed",
    "expected",
    "raw_rate",
    "oe_ratio",
    "rsr_median",
    "rsr_lower",
    "rsr_upper",
    "ratio_median",
    "ratio_lower",
    "ratio_upper",
    "prob_above_benchmark",
    "prob_below_benchmark",
    "rank_median",
    "rank_lower",
    "rank_upper",
    "own_weight",
    "prob_other_side",
    "observed_low",
    "observed_high",
]
PUBLIC_COLUMNS = [
    "measure",
    "unit_id",
    "unit_name",
    "unit_kind",
    "status",
    "count_status",
    *NUMERIC_PUBLIC,
    "position",
    "group",
]
HISTORY_DRAWS = 1000  # draws kept per unit for comparing cycles
RANK_DRAWS = 1000  # draws used for ranks


@dataclass(frozen=True)
class FitSettings:
    """How the fits are made, in the words the methods and model pages use (the site's one view of
    the fitting code's settings)."""

    sampler_checks: dict  # the convergence limits every fit must meet
    priors: list[str]  # one line per prior of the shrinkage model
    k_hat_max: float  # largest Pareto k-hat at which prior sensitivity reweights instead of refits
    families: dict  # case-mix family -> (the model in words, the word for its effect ratio)
    metric_labels: dict  # validation metric -> its label


FIT_SETTINGS = FitSettings(LIMITS, ShrinkageSpec().describe(), K_HAT_MAX, FAMILIES, LABELS)


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
    counts, casemix, draws, tau_draws, diagnostics = (
        fits.counts,
        fits.casemix,
        fits.draws,
        fits.tau,
        fits.diagnostics,
    )
    level = config.reporting.interval
    lo_q, hi_q = (1 - level) / 2, 1 - (1 - level) / 2
    network_rate = casemix.events / casemix.patients
    # benchmark.py: the one definition
    benchmark = reference_rate(config.reporting.benchmark, measure.type, network_rate)
    rsr = draws.ratio * benchmark
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
    protect_units(table, config.reporting.minimum_cases)
    table.loc[table["status"] != "reported", "position"] = ""
    reported = table.loc[table["status"] == "reported", "unit_id"].to_numpy()
    position_of = {u: i for i, u in enumerate(unit_ids)}
    columns = np.array([position_of[u] for u in reported], dtype=int)
    rule = (config.reporting.grouping, config.reporting.grouping_probability, lo_q, hi_q)
    where = table["status"] == "reported"
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
    tau_median = float(np.median(tau_draws))
    if draws.se is not None:
        weight = tau_median**2 / (tau_median**2 + draws.se**2)
        table["own_weight"] = table["unit_id"].map(dict(zip(unit_ids, weight, strict=True)))
    else:
        table["own_weight"] = np.nan
    # continuous: minimum_cases covers it
    threshold = config.reporting.hide_counts_below if measure.type == "binary" else 0
    hide_small_counts(table, threshold, config.reporting.minimum_cases)
    changes = []
    for alt in fits.sensitivity:
        alt_rsr = (alt.draws.ratio * benchmark) if alt.draws is not None else rsr
        weights = None if alt.log_weights is None else np.exp(alt.log_weights)
        alt_groups, _ = group_units(
            alt_rsr[:, columns], benchmark, measure.better, *rule, weights=weights
        )
        names = table.loc[where, "unit_name"].to_numpy()
        changed = [
            (names[i], groups[i], alt_groups[i]) for i in np.flatnonzero(alt_groups != groups)
        ]
        changes.append(
            {"scale": alt.scale, "k_hat": alt.k_hat, "method": alt.method, "changed": changed}
        )
    return MeasureResult(
        measure=measure,
        casemix=casemix,
        diagnostics=diagnostics,
        network_rate=network_rate,
        benchmark=benchmark,
        typical=float(np.median(draws.typical)) * benchmark
        if draws.typical is not None
        else float("nan"),
        tau=(
            float(np.median(tau_draws)),
            float(np.quantile(tau_draws, lo_q)),
            float(np.quantile(tau_draws, hi_q)),
        ),
        table=table,
        rsr_draws=pd.DataFrame(rsr[thin(len(rsr), HISTORY_DRAWS)], columns=unit_ids),
        validation=fits.validation,
        sensitivity=tuple(changes),
    )


def _weighted_quantiles(
    values: np.ndarray, weights: np.ndarray, qs: tuple[float, ...]
) -> list[np.ndarray]:
    """Column-wise quantiles of ``values`` (draws, units) under normalised draw ``weights`` (one
    sort for all)."""
    order = np.argsort(values, axis=0)
    cumulative = np.cumsum(weights[order], axis=0)
    ordered = np.take_along_axis(values, order, axis=0)
    columns = np.arange(values.shape[1])
    return [ordered[np.argmax(cumulative >= q * cumulative[-1], axis=0), columns] for q in qs]


def group_units(
    rsr: np.ndarray,
    benchmark: float,
    better: str,
    rule: str,
    probability: float,
    lo_q: float,
    hi_q: float,
    weights: np.ndarray | None = None,
    interval: tuple[np.ndarray, np.ndarray] | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Each unit's group (better, typical, worse) and the posterior probability that it is on the
    other side.

    ``rule`` "interval": better or worse when the credible interval lies wholly on that side of the
    benchmark; "probability": when the posterior probability of that side is at least
    ``probability``. For a unit in line with the benchmark the "other side" is the less likely of
    the two.
    """
    if rsr.shape[1] == 0:
        return np.array([], dtype=object), np.array([])
    w = np.full(len(rsr), 1 / len(rsr)) if weights is None else weights / weights.sum()
    above, below = w @ (rsr > benchmark), w @ (rsr < benchmark)
    p_better, p_worse = (below, above) if better == "lower" else (above, below)
    if rule == "interval":
        lo, hi = interval if interval is not None else _weighted_quantiles(rsr, w, (lo_q, hi_q))
        is_below, is_above = hi < benchmark, lo > benchmark
        is_better, is_worse = (is_below, is_above) if better == "lower" else (is_above, is_below)
    else:
        is_better, is_worse = p_better >= probability, p_worse >= probability
    groups = np.where(is_better, "better", np.where(is_worse, "worse", "typical")).astype(object)
    other = np.where(
        is_better, p_worse, np.where(is_worse, p_better, np.minimum(p_better, p_worse))
    )
    return groups, other


def rank_summary(rsr: np.ndarray, better: str, lo_q: float, hi_q: float) -> np.ndarray:
    """Median rank and rank interval per unit among the reported units (rank 1 = best for patients),
    draw by draw.

    From at most RANK_DRAWS evenly spaced draws: enough for whole-number ranks, and fast at 10,000
    units.
    """
    if rsr.shape[1] == 0:
        return np.zeros((0, 3))
    rsr = rsr[thin(len(rsr), RANK_DRAWS)]
    ranks = np.argsort(np.argsort(rsr if better == "lower" else -rsr, axis=1), axis=1) + 1
    return np.column_stack(
        [
            np.median(ranks, axis=0),
            np.quantile(ranks, lo_q, axis=0, method="lower"),
            np.quantile(ranks, hi_q, axis=0, method="higher"),
        ]
    )


def public_table(results: list[MeasureResult]) -> pd.DataFrame:
    """Everything that may leave the pipeline: suppressed units keep only their name and state."""
    table = pd.concat([r.table for r in results], ignore_index=True)[PUBLIC_COLUMNS].copy()
    hidden = table["status"] != "reported"
    table[NUMERIC_PUBLIC] = table[NUMERIC_PUBLIC].astype(float)
    table.loc[hidden, NUMERIC_PUBLIC] = np.nan
    return table


def _pulled_towards(r: MeasureResult) -> dict:
    """What small units are pulled towards, for results.json: one typical unit, or the predictors
    and their effects."""
    if r.targets is None:
        return {"predictors": [], "typical_unit": r.typical}
    t = r.targets
    return {
        "predictors": t["terms"],
        "groups": t["groups"],
        "units_whose_group_depends_on_the_predictors": [
            {"unit_id": c.unit_id, "with": c.group_with, "without": c.group_without}
            for c in t["changed"].itertuples()
        ],
    }


def _clean(value):
    if isinstance(value, float) and math.isnan(value):
        return None
    if isinstance(value, (np.floating,)):
        return None if np.isnan(value) else float(value)
    if isinstance(value, (np.integer,)):
        return int(value)
    return value


def results_json(table: pd.DataFrame, results: list[MeasureResult], about: dict) -> str:
    """The downloadable JSON: cycle description, per-measure summaries and the public rows."""
    measures = [
        {
            "key": r.measure.key,
            "name": r.measure.name,
            "definition": r.measure.definition,
            "better": r.measure.better,
            "patients": r.casemix.patients,
            "events": r.casemix.events,
            "network_rate": r.network_rate,
            "benchmark": r.benchmark,
            "typical_unit": r.typical,
            "type": r.measure.type,
            "casemix_family": r.casemix.family,
            "c_statistic": r.casemix.c_statistic,
            "validation": None
            if r.validation is None
            else {
                "folds": r.validation.folds,
                "in_sample": r.validation.in_sample.values,
                "cross_validated": None
                if r.validation.cross_validated is None
                else r.validation.cross_validated.values,
            },
            "excluded_patients": (r.casemix.exclusions or {}).get("dropped_rows", 0),
            "imputed_patients": (r.casemix.exclusions or {}).get("imputed_rows", 0),
            "between_unit_sd": dict(zip(["median", "lower", "upper"], r.tau, strict=True)),
            "pulled_towards": _pulled_towards(r),
            "diagnostics": {
                "rhat_max": r.diagnostics.rhat_max,
                "ess_bulk_min": r.diagnostics.ess_bulk_min,
                "divergences": r.diagnostics.divergences,
            },
        }
        for r in results
    ]
    rows = [{k: _clean(v) for k, v in row.items()} for row in table.to_dict(orient="records")]
    return json.dumps(
        _plain({"about": about, "measures": measures, "results": rows}),
        indent=2,
        ensure_ascii=False,
        allow_nan=False,
    )


def _plain(value):
    """JSON-safe copy: NaN becomes null, numpy numbers become Python numbers."""
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    return _clean(value)


# Meaning of every downloadable column (shown on the downloads page).
DICTIONARY = {
    "measure": "Key of the measure (see results.json for its name and definition).",
    "unit_id": "The unit's id in the network's unit table.",
    "unit_name": "The unit's name.",
    "unit_kind": "What kind of unit it is.",
    "status": "reported; too_few (fewer cases than the publication minimum: numbers withheld); "
    "withheld (numbers withheld so a smaller unit's cannot be worked out from "
    "network totals); no_cases.",
    "count_status": "For reported units: shown; small (fewer than "
    "[reporting].hide_counts_below patients with the outcome, or without it: "
    "observed, raw_rate, oe_ratio and own_weight are left empty and "
    "observed_low to observed_high gives the range); protects (the same values "
    "left empty so that a small count cannot be worked out from the network "
    "total).",
    "cases": "Patients counted for this measure.",
    "observed": "Patients who had the outcome.",
    "expected": "Patients expected to have the outcome given their recorded risk factors, at "
    "the benchmark (case-mix fit; over the network, expected adds up to the "
    "benchmark rate times cases).",
    "raw_rate": "observed / cases, not adjusted for risk or chance.",
    "oe_ratio": "observed / expected, not adjusted for chance.",
    "rsr_median": "Risk-standardised rate (or adjusted mean): ratio_median times the "
    "benchmark; posterior median.",
    "rsr_lower": "Lower end of the credible interval of the risk-standardised rate.",
    "rsr_upper": "Upper end of the credible interval of the risk-standardised rate.",
    "ratio_median": "Predicted / expected: the unit's events (or total) predicted by the "
    "shrinkage fit for its own patients, over the same expected column; 1 is "
    "the benchmark. Posterior median.",
    "ratio_lower": "Lower end of the credible interval of that ratio.",
    "ratio_upper": "Upper end of the credible interval of that ratio.",
    "prob_above_benchmark": "Posterior probability that the risk-standardised rate (or "
    "adjusted mean) is above the benchmark.",
    "prob_below_benchmark": "Posterior probability that it is below the benchmark.",
    "rank_median": "Median rank among the reported units, draw by draw (1 = best for patients).",
    "rank_lower": "Lower end of the credible interval of the rank.",
    "rank_upper": "Upper end of the credible interval of the rank.",
    "own_weight": "Share of the estimate that rests on the unit's own patients (tau^2 / (tau^2 "
    "+ se^2)); the rest comes from the network.",
    "observed_low": "For a small count: the lowest number of patients with the outcome it can "
    "be (empty otherwise).",
    "observed_high": "For a small count: the highest number it can be.",
    "prob_other_side": "Posterior probability that the unit is really on the other side of the "
    "benchmark from its group (for 'typical': the less likely side).",
    "position": "above / spans / below: where the credible interval sits relative to the "
    "benchmark.",
    "group": "better / typical / worse than the benchmark, by the rule in the methods "
    "([reporting].grouping).",
}
