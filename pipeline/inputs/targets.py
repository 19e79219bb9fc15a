"""What small units are pulled towards: unit-level predictors of the shrinkage target.

Without predictors every unit's intercept is drawn from one common Normal(mu, tau), so a unit
with few patients is pulled towards the typical unit. With ``pull_towards`` set for a measure,
the prior mean of each unit's intercept becomes mu + w_i . beta: a unit is pulled towards units
like it (by size, kind, patients' severity or another recorded attribute), and tau is the spread
around that line. Every verdict is still a comparison with the one benchmark (benchmark.py):
predictors change what a unit is pulled towards, never what it is compared with.

Built-in predictors (``PREDICTORS``), plus any numeric column of the units table:

* ``log_cases``: the log of the unit's cases for this measure (a volume-outcome relationship;
  Silber et al. 2010, Health Services Research 45:1148, from memory);
* ``case_mix``: the unit's mean case-mix risk, the mean over its patients of the linear risk
  x_ij b (the correlated random-effects term of Mundlak 1978, Econometrica 46:69, from memory,
  reduced to the one risk score the case-mix fit gives);
* ``kind``: the unit kind of the units table, one indicator per kind against the most common one.

Each column is centred and scaled over the units with data, so beta is the change in the
log-odds (or log mean) per standard deviation of the predictor, mu is still the typical unit
(one with average predictors) and the priors do not depend on the predictors' units.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

# Built-in predictors: name -> what it is (printed in DEVELOPERS.md and on the methods page).
PREDICTORS = {
    "log_cases": "the log of the unit's number of cases for the measure",
    "case_mix": "the unit's average case-mix risk (the mean of its patients' risk scores from "
    "the case-mix fit)",
    "kind": "the unit's kind from the units table (one term for each kind other than the most "
    "common)",
}
# at least this many units with data per predictor column (common practice, no source)
UNITS_PER_PREDICTOR = 10


@dataclass(frozen=True)
class TargetDesign:
    """The standardised predictor matrix of one measure's units, with what is needed to explain
    it."""

    columns: tuple[str, ...]  # one label per column ("log_cases", "kind: clinic", ...)
    # (units, columns), centred and scaled over units with data; 0 for units without data
    w: np.ndarray
    centre: np.ndarray  # (columns,) means before scaling
    spread: np.ndarray  # (columns,) standard deviations before scaling


def check(
    names: tuple[str, ...],
    measure_key: str,
    attributes: pd.DataFrame,
    kinds: pd.Series,
    present: pd.Index,
    has_patients: bool,
    has_risk: bool,
    cases: pd.Series | None = None,
) -> list[str]:
    """Problems with a measure's ``pull_towards`` list, before anything is fitted (empty: none).

    ``attributes``: numeric-or-not extra columns of the units table (index unit id); ``kinds``:
    unit kind per unit id; ``present``: the units with data for this measure; ``cases``: cases per
    unit, when known.
    """
    problems = []
    seen = set()
    n_columns = 0
    for name in names:
        if name in seen:
            problems.append(f"'{name}' is listed twice")
            continue
        seen.add(name)
        if name in ("log_cases", "case_mix", "kind"):
            found, columns = _builtin_problems(name, kinds, present, has_patients, has_risk, cases)
            problems += found
            n_columns += columns
        elif name not in attributes.columns:
            allowed = ", ".join([*PREDICTORS, *[c for c in attributes.columns]])
            problems.append(
                f"'{name}' is neither a built-in predictor nor a column of the units table; "
                f"allowed: {allowed}"
            )
        else:
            problems += _column_problems(name, attributes[name].loc[present])
            n_columns += 1
    if n_columns and len(present) < UNITS_PER_PREDICTOR * n_columns:
        problems.append(
            f"{n_columns} predictor term(s) need at least {UNITS_PER_PREDICTOR * n_columns} "
            "units with data "
            f"({UNITS_PER_PREDICTOR} per term); this measure has {len(present)}"
        )
    return [f"{p} (measure '{measure_key}')." for p in problems]


def _builtin_problems(
    name: str,
    kinds: pd.Series,
    present: pd.Index,
    has_patients: bool,
    has_risk: bool,
    cases: pd.Series | None,
) -> tuple[list[str], int]:
    """Problems with one built-in predictor, and how many columns it adds to the design."""
    found: list[str] = []
    columns = 0
    if name == "log_cases":
        if cases is not None and cases.loc[present].nunique() < 2:
            found.append(
                "'log_cases' is the same for every unit (every unit has the same number of cases)"
            )
        columns = 1
    elif name == "case_mix":
        if not has_patients:
            found.append(
                "'case_mix' needs patient rows; this measure is read from unit-level totals"
            )
        elif not has_risk:
            found.append(
                "'case_mix' needs risk factors; this measure's casemix is \"1\" (no adjustment)"
            )
        columns = 1
    elif name == "kind":
        levels = kinds.loc[present].nunique()
        if levels < 2:
            found.append(
                "'kind' is the same for every unit with data, so it cannot tell units apart"
            )
        columns = max(levels - 1, 0)
    return found, columns


def _column_problems(name: str, values: pd.Series) -> list[str]:
    """A units-table column named in ``pull_towards`` holds a number for every unit with data,
    and not the same one."""
    column = pd.to_numeric(values, errors="coerce")
    bad = column.isna() & values.notna()
    if bad.any():
        return [
            f"units table column '{name}' must hold numbers; found "
            f"{values[bad].iloc[0]!r} "
            f"for unit(s) {_ids(bad[bad].index)}"
        ]
    if column.isna().any():
        return [
            f"units table column '{name}' is empty for unit(s) "
            f"{_ids(column.index[column.isna()])}; every unit with data needs a value"
        ]
    if column.nunique() < 2:
        return [
            f"units table column '{name}' is the same for every unit with data, so it "
            "cannot tell units apart"
        ]
    return []


def _ids(index) -> str:
    ids = [str(i) for i in index]
    return ", ".join(ids[:5]) + (f" and {len(ids) - 5} more" if len(ids) > 5 else "")


def design(
    names: tuple[str, ...],
    unit_ids: list[str],
    present: np.ndarray,
    cases: np.ndarray,
    mean_risk: np.ndarray | None,
    kinds: pd.Series,
    attributes: pd.DataFrame,
) -> TargetDesign:
    """The predictor matrix for units ``unit_ids`` (``present``: which have data for this
    measure)."""
    raw, labels = [], []
    for name in names:
        if name == "log_cases":
            raw.append(np.log(np.maximum(np.asarray(cases, float), 1.0)))
            labels.append("log_cases")
        elif name == "case_mix":
            raw.append(np.asarray(mean_risk, float))
            labels.append("case_mix")
        elif name == "kind":
            k = kinds.reindex(unit_ids).astype(str)
            levels = k[present].value_counts()
            reference = sorted(levels.index[levels == levels.max()])[0]
            for level in sorted(set(levels.index) - {reference}):
                raw.append((k == level).to_numpy(float))
                labels.append(f"kind: {level}")
        else:
            raw.append(
                pd.to_numeric(attributes[name].reindex(unit_ids), errors="coerce").to_numpy(float)
            )
            labels.append(name)
    if not raw:
        return TargetDesign((), np.zeros((len(unit_ids), 0)), np.zeros(0), np.zeros(0))
    x = np.column_stack(raw)
    centre = x[present].mean(axis=0)
    spread = x[present].std(axis=0)
    w = np.where(present[:, None], (x - centre) / np.where(spread > 0, spread, 1.0), 0.0)
    return TargetDesign(tuple(labels), w, centre, spread)
