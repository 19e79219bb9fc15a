"""The downloads: the public results table, results.json and the data dictionary.

:func:`public_table` is everything that may leave the pipeline: the rows of every measure with
the disclosure rules already applied (``results.py``), hidden values blanked.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd

from pipeline.results import MeasureResult

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


def results_json(table: pd.DataFrame, results: list[MeasureResult], manifest: dict) -> str:
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
        _plain({"about": manifest, "measures": measures, "results": rows}),
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
