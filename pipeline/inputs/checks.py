"""Checks of the cohort's and the unit table's columns and values; each adds its problems to a
list, naming the file, the column, the first offending rows and what is allowed.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from pipeline.config import CycleConfig
from pipeline.errors import Problem
from pipeline.inputs.tables import TOO_LARGE, row_list

UNIT_TABLE_COLUMNS = ("id", "name", "kind")


# Column names that suggest direct identifiers (common practice, no source: the usual
# suspects of de-identification checklists). Such columns are never carried past this module.
IDENTIFIER = re.compile(
    r"(^|_)(name|first_?name|given_?name|surname|last_?name|family_?name|mrn|medical_?record\w*|nhs_?(no|number)?|"
    r"ssn|social_?security\w*|patient_?(id|no|number)|dob|date_?of_?birth|birth_?date|phone|telephone|mobile|"
    r"e_?mail|address|street|post_?code|zip(_?code)?)($|_)",
    re.IGNORECASE,
)


FAR_OUT = 100  # a value this many interquartile ranges from the median is counted in a warning


def check_units(units: pd.DataFrame, where: str, problems: list[Problem]) -> None:
    missing = [c for c in UNIT_TABLE_COLUMNS if c not in units.columns]
    for c in missing:
        problems.append(
            Problem(
                f"{where}, column '{c}'",
                f"is missing. A unit table needs columns {', '.join(UNIT_TABLE_COLUMNS)}.",
            )
        )
    if missing:
        return
    for c in UNIT_TABLE_COLUMNS:
        empty = units[c].isna() | (units[c].astype("string").str.strip() == "")
        if empty.any():
            problems.append(
                Problem(
                    f"{where}, column '{c}'",
                    f"is empty at {row_list(empty)}; every unit needs an id, a name and a kind.",
                )
            )
    dup = units["id"].duplicated(keep=False) & units["id"].notna()
    if dup.any():
        problems.append(
            Problem(
                f"{where}, column 'id'",
                f"repeats ids at {row_list(dup)}; each unit must appear once.",
            )
        )


def check_outcome(
    rows: pd.DataFrame, column: str, kind: str, where: str, problems: list[Problem]
) -> None:
    values = rows[column]
    missing = values.isna()
    if missing.any():
        problems.append(
            Problem(
                f"{where}, column '{column}'",
                f"has no value at {row_list(missing)}; every row needs its outcome.",
            )
        )
    numeric = pd.to_numeric(values, errors="coerce")
    not_number = numeric.isna() & ~missing
    if not_number.any():
        sample = values[not_number].iloc[0]
        problems.append(
            Problem(
                f"{where}, column '{column}'",
                f"must be numbers; found '{sample}' at {row_list(not_number)}.",
            )
        )
        return
    if kind == "binary":
        bad = numeric.notna() & ~numeric.isin([0, 1])
        if bad.any():
            sample = numeric[bad].iloc[0]
            problems.append(
                Problem(
                    f"{where}, column '{column}'",
                    f"must be 0 or 1 for a binary measure; found {sample:g} at {row_list(bad)}.",
                )
            )
    elif kind == "continuous":
        bad = (
            numeric.notna() & ~(numeric > 0)
            | ~np.isfinite(numeric.fillna(1.0))
            | numeric.ge(TOO_LARGE)
        )
        if bad.any():
            sample = numeric[bad].iloc[0]
            problems.append(
                Problem(
                    f"{where}, column '{column}'",
                    f"must be a positive number below {TOO_LARGE:g} for a continuous measure "
                    f"(gamma and log-normal models need values above 0); found {sample:g} at "
                    f"{row_list(bad)}. "
                    "For stays shorter than a day, record the fraction of a day (e.g. 0.5).",
                )
            )


def check_expected(
    rows: pd.DataFrame, column: str, kind: str, where: str, problems: list[Problem]
) -> None:
    """A supplied expected value: a risk strictly between 0 and 1 (binary) or a positive number."""
    values = pd.to_numeric(rows[column], errors="coerce")
    if kind == "binary":
        bad, allowed = ~((values > 0) & (values < 1)), "a risk strictly between 0 and 1"
    else:
        bad, allowed = (
            ~((values > 0) & (values < TOO_LARGE)),
            f"a positive number below {TOO_LARGE:g}",
        )
    if bad.any():
        sample = rows[column][bad].iloc[0]
        problems.append(
            Problem(
                f"{where}, column '{column}'",
                f"must hold {allowed} for every row (a supplied expected value); found "
                f"'{sample}' at {row_list(bad)}.",
            )
        )


def check_magnitude(
    numeric: pd.Series, column: str, where: str, problems: list[Problem], warnings: list[str]
) -> None:
    """Numbers the fits can use: finite, below TOO_LARGE in size; values far from the rest are
    counted in a warning."""
    infinite = pd.Series(np.isinf(numeric.to_numpy(dtype=float)), index=numeric.index)
    if infinite.any():
        sample = numeric[infinite].iloc[0]
        problems.append(
            Problem(
                f"{where}, column '{column}'",
                f"must hold finite numbers; found {sample} at {row_list(infinite)}. "
                "Replace the value, or leave the cell empty if it is unknown.",
            )
        )
    huge = numeric.abs().ge(TOO_LARGE) & ~infinite
    if huge.any():
        sample = numeric[huge].iloc[0]
        problems.append(
            Problem(
                f"{where}, column '{column}'",
                f"has a value too large to fit ({sample:g}; allowed: below {TOO_LARGE:g} "
                f"in size) at {row_list(huge)}. Check the extract, or rescale the column.",
            )
        )
    usable = numeric[np.isfinite(numeric.to_numpy(dtype=float)) & ~huge]
    if len(usable) >= 4:
        low, median, high = usable.quantile([0.25, 0.5, 0.75])
        spread = high - low
        if spread > 0:
            far = (numeric - median).abs().gt(FAR_OUT * spread) & ~infinite & ~huge
            if far.any():
                warnings.append(
                    f"{where}, column '{column}': {int(far.sum())} value(s) lie more than "
                    f"{FAR_OUT} interquartile "
                    f"ranges from the median (such as {numeric[far].iloc[0]:g}, at "
                    f"{row_list(far)}); check that they are real."
                )


def check_risk_factor(
    rows: pd.DataFrame,
    column: str,
    where: str,
    problems: list[Problem],
    stop_on_missing: bool,
    warnings: list[str],
) -> None:
    values = rows[column]
    missing = values.isna()
    if missing.any() and stop_on_missing:
        problems.append(
            Problem(
                f"{where}, column '{column}'",
                f"has no value at {row_list(missing)}. Fill or remove those rows, or set the "
                'measure\'s missing = "drop" or "impute" '
                "(the rows left out or filled in are then counted on the model report).",
            )
        )
    if values.dtype.kind in "O" or pd.api.types.is_string_dtype(values):
        as_number = pd.to_numeric(values, errors="coerce")
        numeric_share = as_number.notna().mean()
        if 0.9 <= numeric_share < 1:
            odd = as_number.isna() & ~missing
            sample = values[odd].iloc[0]
            problems.append(
                Problem(
                    f"{where}, column '{column}'",
                    f"looks numeric but has text such as '{sample}' at {row_list(odd)}; use "
                    "numbers only, or wrap the column in C() if it is a category.",
                )
            )
    elif pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values):
        check_magnitude(values.astype(float), column, where, problems, warnings)


def check_comparable(
    config: CycleConfig, rows: pd.DataFrame, unit_col: str, where: str, problems: list[Problem]
) -> None:
    """A measure needs events and non-events, and a comparison needs two units."""
    n_units = rows[unit_col].nunique()
    if n_units < 2:
        problems.append(
            Problem(
                f"{where}, column '{unit_col}'",
                f"all rows belong to one unit ('{rows[unit_col].iloc[0]}'); fairgauge compares "
                "units, so at least two are needed.",
            )
        )
    for m in config.measures:
        if m.summary:
            continue
        values = pd.to_numeric(rows[m.outcome], errors="coerce")
        if m.type == "binary" and values.isin([0, 1]).all():
            events = int(values.sum())
            if events in (0, len(values)):
                who = "no patient had" if events == 0 else "every patient had"
                problems.append(
                    Problem(
                        f"{where}, column '{m.outcome}'",
                        f"{who} the outcome of measure '{m.key}', so units cannot be compared "
                        "on it. Check the extract, or remove the measure from the config.",
                    )
                )
