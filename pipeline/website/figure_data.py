"""What each figure shows: its file path and a small DataFrame of exactly what is drawn.

The draw functions (``figures.py``) draw these frames, and the captions (``captions.py``) build
the alt text and the table beside each figure from the same frames, so the words and the
picture cannot disagree.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline.config import family_for
from pipeline.results import MeasureResult


def measure_figure_path(measure_key: str, kind: str = "intervals") -> str:
    """kind: intervals | funnel | movement."""
    return f"figures/{kind}-{measure_key}.svg"


def unit_figure_path(address: str, kind: str = "position") -> str:
    """kind: position | trend."""
    return f"figures/{kind}-{address}.svg"


def png_of(relative: str) -> str:
    return relative[: -len(".svg")] + ".png"


def model_figure_path(measure_key: str, kind: str) -> str:
    return f"figures/model-{measure_key}-{kind}.svg"


def axis(result: MeasureResult) -> tuple[float, str]:
    """(multiplier, axis label) for a measure's adjusted values: percent for rates, the outcome's
    unit otherwise."""
    if not family_for(result.measure).counts_events:
        return 1.0, f"Adjusted mean, {result.measure.unit_label}"
    return 100.0, "Risk-standardised rate, %"


def measure_figure_data(result: MeasureResult) -> pd.DataFrame:
    """What the interval chart shows: reported units, lowest adjusted value first."""
    t = result.table[result.table["status"] == "reported"].sort_values(["rsr_median", "unit_name"])
    k = axis(result)[0]
    return pd.DataFrame(
        {
            "unit_name": t["unit_name"],
            "rsr": t["rsr_median"] * k,
            "lo": t["rsr_lower"] * k,
            "hi": t["rsr_upper"] * k,
            "group": t["group"],
        }
    ).reset_index(drop=True)


def movement_figure_data(result: MeasureResult) -> pd.DataFrame:
    """Each reported unit's raw and adjusted value, fewest cases first (small units move most)."""
    t = result.table[
        (result.table["status"] == "reported") & result.table["raw_rate"].notna()
    ].sort_values(["cases", "unit_name"])
    k = axis(result)[0]
    return pd.DataFrame(
        {
            "unit_name": t["unit_name"],
            "cases": t["cases"].astype(int),
            "raw": t["raw_rate"] * k,
            "adjusted": t["rsr_median"] * k,
            "group": t["group"],
        }
    ).reset_index(drop=True)


def position_frame(results: list[MeasureResult]) -> pd.DataFrame:
    """The part of every unit strip that is the same for all units: per measure, where most units
    sit.

    Ratios to the benchmark: the benchmark itself (1, benchmark.py), and the 10th-90th percentile
    band of the reported units' adjusted ratios.
    """
    rows = []
    for r in results:
        t = r.table[r.table["status"] == "reported"]
        lo, hi = np.quantile(t["ratio_median"], [0.1, 0.9]) if len(t) else (np.nan, np.nan)
        rows.append(
            {
                "measure": r.measure.name,
                "bench": 1.0,
                "band_lo": lo,
                "band_hi": hi,
                "x_min": float(t["ratio_lower"].min()) if len(t) else 0.8,
                "x_max": float(t["ratio_upper"].max()) if len(t) else 1.25,
            }
        )
    return pd.DataFrame(rows)


def position_data(unit_id: str, results: list[MeasureResult]) -> pd.DataFrame | None:
    """A unit's adjusted ratio to the benchmark on every measure (NaN where not reported); None if
    none reported."""
    rows = []
    for r in results:
        row = r.table[r.table["unit_id"] == unit_id]
        reported = len(row) and row["status"].iloc[0] == "reported"
        rows.append(
            {
                "measure": r.measure.name,
                "ratio": row["ratio_median"].iloc[0] if reported else np.nan,
                "lo": row["ratio_lower"].iloc[0] if reported else np.nan,
                "hi": row["ratio_upper"].iloc[0] if reported else np.nan,
                "group": row["group"].iloc[0] if reported else "",
            }
        )
    data = pd.DataFrame(rows)
    return None if data["ratio"].isna().all() else data


def trend_data(
    unit_id: str, results: list[MeasureResult], past, period: str = "this cycle"
) -> pd.DataFrame | None:
    """A unit's published adjusted values in each kept cycle and now (scaled like the measure
    charts)."""
    rows = []
    for r in results:
        k = axis(r)[0]
        cycles = [(p.period, p.table[p.table["measure"] == r.measure.key]) for p in past] + [
            (None, r.table)
        ]
        for i, (label, table) in enumerate(cycles):
            row = table[(table["unit_id"] == unit_id) & (table["status"] == "reported")]
            if len(row):
                rows.append(
                    {
                        "measure": r.measure.name,
                        "order": i,
                        "period": label or period,
                        "value": row["rsr_median"].iloc[0] * k,
                        "lo": row["rsr_lower"].iloc[0] * k,
                        "hi": row["rsr_upper"].iloc[0] * k,
                    }
                )
    data = pd.DataFrame(rows)
    if data.empty or data.groupby("measure")["order"].nunique().max() < 2:
        return None  # a trend needs at least two cycles
    return data


def roc_figure_data(result: MeasureResult) -> pd.DataFrame:
    """ROC curves, in-sample and cross-validated, one row per point."""
    v = result.model_validation
    curves = [("In sample", v.in_sample)]
    if v.cross_validated is not None:
        curves.append((f"Cross-validated ({v.folds} folds)", v.cross_validated))
    parts = []
    for fit, metrics in curves:
        if metrics.roc is None:
            raise ValueError(f"{result.measure.key}: ROC curves are for binary outcomes only")
        parts.append(metrics.roc.assign(fit=fit))
    return pd.concat(parts, ignore_index=True)


def calibration_figure_data(result: MeasureResult) -> pd.DataFrame:
    """Observed against expected mean per risk group, in-sample and cross-validated (percent for
    rates)."""
    v = result.model_validation
    k = 100.0 if v.binary else 1.0
    parts = [("In sample", v.in_sample)] + (
        [(f"Cross-validated ({v.folds} folds)", v.cross_validated)] if v.cross_validated else []
    )
    return pd.concat(
        [
            pd.DataFrame(
                {
                    "group": m.groups["group"],
                    "expected": m.groups["expected_mean"] * k,
                    "observed": m.groups["observed_mean"] * k,
                    "fit": name,
                }
            )
            for name, m in parts
        ],
        ignore_index=True,
    )
