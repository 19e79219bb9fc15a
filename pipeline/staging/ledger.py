"""The record ledger: for every unit and measure, the patient records that were counted and the
ones left out, with the reason for each. Confidential: it goes into the staging folder and the
unit previews, never into the site.

A unit checks its ledger against its own systems: a stay it treated that is missing, a stay that
is not its own, an outcome recorded wrongly, a risk factor that was missing. Each counted record
carries its expected value at the benchmark (the same number the public expected count adds
up), so per unit the counted records add up exactly to the published cases, observed and
expected counts (``tests/test_staging.py`` checks this).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline.formulas import formula_variables
from pipeline.inputs.data import Cohort
from pipeline.results import MeasureResult

LEDGER_COLUMNS = ["unit_id", "measure", "record_id", "status", "reason", "outcome", "expected"]
COUNTED, LEFT_OUT = "counted", "left out"
COUNT_COLUMNS = [
    "measure",
    "measure_name",
    "records",
    "cases",
    "observed",
    "expected",
    "left_out",
    "imputed",
    "public_status",
    "public_count",
]


def record_ledger(cohort: Cohort, results: list[MeasureResult]) -> pd.DataFrame:
    """One row per patient record and measure with patient rows (measures read as unit totals
    have no records)."""
    frames = [_measure_ledger(cohort, r) for r in results if r.row_expected is not None]
    if not frames:
        return pd.DataFrame(columns=LEDGER_COLUMNS)
    return pd.concat(frames, ignore_index=True)[LEDGER_COLUMNS]


def _measure_ledger(cohort: Cohort, result: MeasureResult) -> pd.DataFrame:
    m = result.measure
    rows = cohort.rows
    used = np.asarray(result.casemix.used, dtype=bool)
    ids = cohort.record_ids
    if ids is None:
        ids = pd.Series([f"row {i + 1}" for i in range(len(rows))], dtype="string")
    expected = np.full(len(rows), np.nan)
    expected[used] = np.asarray(result.row_expected, dtype=float)
    frame = pd.DataFrame(
        {
            "unit_id": rows[cohort.unit_column].astype("string").to_numpy(),
            "measure": m.key,
            "record_id": ids.to_numpy(),
            "status": np.where(used, COUNTED, LEFT_OUT),
            "reason": "",
            "outcome": rows[m.outcome].to_numpy(dtype=float),
            "expected": expected,
        }
    )
    if m.expected_column:
        return frame
    factors = [v for v in formula_variables(m.casemix) if v in rows.columns]
    missing = rows[factors].isna()
    if not missing.to_numpy().any():
        return frame
    names = missing.apply(lambda row: ", ".join(row.index[row.to_numpy()]), axis=1).to_numpy()
    gaps = missing.any(axis=1).to_numpy()
    frame.loc[gaps & ~used, "reason"] = "missing risk factor: " + pd.Series(names)[gaps & ~used]
    frame.loc[gaps & used, "reason"] = (
        "counted with an imputed risk factor: " + (pd.Series(names)[gaps & used])
    )
    return frame


def read_ledger(path) -> pd.DataFrame:
    """A ledger written to CSV, read back with its ids as text and empty reasons as ""."""
    ledger = pd.read_csv(path, dtype={"unit_id": "string", "record_id": "string", "reason": str})
    ledger["reason"] = ledger["reason"].fillna("")
    return ledger


def unit_counts(unit_id: str, ledger: pd.DataFrame, results: list[MeasureResult]) -> pd.DataFrame:
    """A unit's counts by measure: its records, what was counted (exact, small counts included:
    the preview is the unit's own) and what the public site shows of them."""
    rows = []
    for r in results:
        row = r.table.set_index("unit_id").loc[unit_id]
        mine = ledger[(ledger["measure"] == r.measure.key) & (ledger["unit_id"] == unit_id)]
        patient_rows = r.row_expected is not None
        rows.append(
            {
                "measure": r.measure.key,
                "measure_name": r.measure.name,
                "records": len(mine) if patient_rows else np.nan,
                "cases": row["cases"],
                "observed": row["observed"],
                "expected": row["expected"],
                "left_out": int((mine["status"] == LEFT_OUT).sum()) if patient_rows else np.nan,
                "imputed": int(mine["reason"].str.contains("imputed").sum())
                if patient_rows
                else np.nan,
                "public_status": row["status"],
                "public_count": _public_count(row),
            }
        )
    return pd.DataFrame(rows, columns=COUNT_COLUMNS)


def _public_count(row: pd.Series) -> str:
    """What the public site shows of the unit's outcome count."""
    if row["status"] != "reported":
        return "not shown (unit not reported)"
    if row.get("count_status") == "small":
        return f"shown as a range, {row['observed_low']:g} to {row['observed_high']:g}"
    if row.get("count_status") == "protects":
        return "not shown (protects a small count elsewhere)"
    return f"{row['observed']:g}"
