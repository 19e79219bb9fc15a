"""Reading and checking a cycle's inputs: the cohort (patient rows) and the unit table.

Every check collects its problems; one :class:`~pipeline.errors.InputError` lists them all,
each naming the file, the column, the first offending rows and what is allowed.
Rows are numbered from 1 = the first data row (for a CSV, file line = row + 1).
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass

import pandas as pd

from pipeline.config import CycleConfig
from pipeline.errors import InputError, Problem
from pipeline.formulas import formula_variables
from pipeline.inputs.checks import (
    IDENTIFIER,
    UNIT_TABLE_COLUMNS,
    check_comparable,
    check_expected,
    check_outcome,
    check_risk_factor,
    check_units,
)
from pipeline.inputs.tables import file_sha256, read_input, row_list
from pipeline.inputs.targets import check as check_targets
from pipeline.inputs.unit_totals import read_unit_totals


@dataclass(frozen=True)
class Cohort:
    """Validated inputs of one cycle."""

    rows: pd.DataFrame  # patient rows; the unit column is text, row order as in the file
    units: pd.DataFrame  # unit table indexed by id (text), columns name, kind
    unit_column: str
    sha256: dict[str, str]  # file name -> SHA-256 of its bytes, for provenance
    warnings: tuple[str, ...]
    # measure key -> unit-level input (index unit id; cases, observed, expected)
    unit_tables: dict[str, pd.DataFrame | None] | None = None
    # the unit table's other columns (index unit id), for pull_towards (targets.py)
    attributes: pd.DataFrame | None = None
    # "cohort"/"units" -> where rows read from a database came from (warehouse.Provenance)
    provenance: dict | None = None
    # each patient row's record id as text ([inputs].record_column), or "row N" (N from 1, as in
    # error messages) without one; for the confidential unit previews only, never published
    record_ids: pd.Series | None = None

    def units_with_cases(self) -> set[str]:
        """Ids of the units with at least one patient row or a row of unit totals."""
        return units_with_cases(self.rows[self.unit_column], self.unit_tables or {})

    def unit_totals(self, measure_key: str) -> pd.DataFrame:
        """The unit-level input of a measure, read from its ``summary`` file or query."""
        table = (self.unit_tables or {}).get(measure_key)
        if table is None:
            raise ValueError(f"{measure_key}: no unit-level input was read")
        return table


def units_with_cases(row_units: pd.Series, unit_tables: dict[str, pd.DataFrame | None]) -> set[str]:
    """Units named by a patient row or by a measure's unit totals."""
    return set(row_units) | {u for t in unit_tables.values() if t is not None for u in t.index}


def load_cohort(config: CycleConfig) -> Cohort:
    """Read the unit table and the cohort named in ``config`` and check them together."""
    inputs = config.inputs
    unit_col = inputs.unit_column
    provenance: dict[str, dict] = {}
    units, u_where, rows, c_where = _read_tables(config, provenance)
    problems: list[Problem] = []
    warnings: list[str] = []
    check_units(units, u_where, problems)
    needed, risk_factors, stop_on_missing = _needed_columns(config, problems)
    _check_present(rows, needed, c_where, problems)
    if problems:  # later checks need these columns and a sound unit table
        raise InputError(problems)
    rows[unit_col] = rows[unit_col].astype("string").str.strip()
    units = units.assign(id=units["id"].astype("string").str.strip()).set_index("id")
    _check_ids(config, rows, units, c_where, u_where, problems, warnings)
    _check_values(config, rows, risk_factors, stop_on_missing, c_where, problems, warnings)
    if problems:
        raise InputError(problems)
    patient_measures = [m for m in config.measures if not m.summary]
    keep = [
        unit_col,
        *dict.fromkeys(
            [m.outcome for m in patient_measures]
            + [m.expected_column for m in patient_measures if m.expected_column]
            + risk_factors
        ),
    ]
    hashes = _hashes(inputs, provenance)
    unit_tables = read_unit_totals(config, units.index, provenance, hashes, problems)
    attributes = units.drop(columns=list(UNIT_TABLE_COLUMNS[1:]))
    _check_targets(config, rows, units, unit_tables, attributes, u_where, problems)
    if problems:
        raise InputError(problems)
    warnings += _idle_units(rows[unit_col], units.index, unit_tables, u_where)
    record_ids = (
        rows[inputs.record_column].astype("string").str.strip()
        if inputs.record_column
        else pd.Series([f"row {i + 1}" for i in range(len(rows))], dtype="string")
    ).reset_index(drop=True)
    return Cohort(
        rows=rows[keep].reset_index(drop=True),
        units=units[["name", "kind"]].astype("string"),
        attributes=attributes,
        unit_column=unit_col,
        sha256=hashes,
        warnings=tuple(warnings),
        unit_tables=unit_tables,
        provenance=provenance,
        record_ids=record_ids,
    )


def _read_tables(
    config: CycleConfig, provenance: dict
) -> tuple[pd.DataFrame, str, pd.DataFrame, str]:
    """The unit table and the cohort, each with how errors name it."""
    inputs = config.inputs
    text_cols = tuple(c for c in (inputs.unit_column, inputs.record_column) if c)
    units, u_where = read_input(inputs, "units", ("id",), provenance)
    # every measure is read from unit totals (config.py checks this)
    if inputs.cohort is None and not inputs.cohort_query:
        rows = pd.DataFrame({c: pd.Series([], dtype="string") for c in text_cols})
        return units, u_where, rows, "cohort"
    rows, c_where = read_input(inputs, "cohort", text_cols, provenance)
    return units, u_where, rows, c_where


def _needed_columns(
    config: CycleConfig, problems: list[Problem]
) -> tuple[dict[str, str], list[str], dict[str, bool]]:
    """Columns the cohort must have (each with the config key that names it), the risk factors
    in formula order, and whether a missing value of each stops the cycle."""
    inputs = config.inputs
    needed: dict[str, str] = {inputs.unit_column: "[inputs].unit_column"}
    if inputs.record_column:
        needed[inputs.record_column] = "[inputs].record_column"
    risk_factors: list[str] = []
    stop_on_missing: dict[str, bool] = {}
    for i, m in enumerate(config.measures):
        if m.summary:
            continue
        needed.setdefault(m.outcome, f"measures[{i}].outcome")
        if m.expected_column:
            needed.setdefault(m.expected_column, f"measures[{i}].expected_column")
        try:
            variables = formula_variables(m.casemix)
        except ValueError as exc:
            problems.append(Problem(f"measures[{i}].casemix", str(exc)))
            continue
        for v in variables:
            needed.setdefault(v, f"measures[{i}].casemix")
            risk_factors.append(v)
            stop_on_missing[v] = stop_on_missing.get(v, False) or m.missing == "stop"
    return needed, risk_factors, stop_on_missing


def _check_present(
    rows: pd.DataFrame, needed: dict[str, str], c_where: str, problems: list[Problem]
) -> None:
    for c in [c for c in needed if c not in rows.columns]:
        close = difflib.get_close_matches(c, [str(x) for x in rows.columns], n=1)
        hint = f" Did you mean '{close[0]}'?" if close else ""
        problems.append(
            Problem(
                f"{c_where}, column '{c}'",
                f"is missing (named by {needed[c]}).{hint} Columns present: "
                f"{', '.join(map(str, rows.columns))}.",
            )
        )


def _check_ids(
    config: CycleConfig,
    rows: pd.DataFrame,
    units: pd.DataFrame,
    c_where: str,
    u_where: str,
    problems: list[Problem],
    warnings: list[str],
) -> None:
    """Every row's unit is in the unit table; no record id (or, without ids, no row) repeats."""
    unit_col, record_col = config.inputs.unit_column, config.inputs.record_column
    unknown = ~rows[unit_col].isin(units.index)
    if unknown.any():
        sample = rows.loc[unknown, unit_col].iloc[0]
        problems.append(
            Problem(
                f"{c_where}, column '{unit_col}'",
                f"has unit ids not in the unit table {u_where}, such as '{sample}', at "
                f"{row_list(unknown)}. Add them to the unit table or correct the ids.",
            )
        )
    if record_col:
        dup = rows[record_col].duplicated(keep=False)
        if dup.any():
            problems.append(
                Problem(
                    f"{c_where}, column '{record_col}'",
                    f"repeats record ids at {row_list(dup)}; each admission or procedure must "
                    "appear once. Remove the duplicate rows.",
                )
            )
        return
    dup = rows.duplicated(keep=False)
    if dup.any():
        warnings.append(
            f"{c_where}: {int(dup.sum())} rows are exact copies of another row "
            f"({row_list(dup)}); set [inputs].record_column to check ids properly."
        )


def _check_values(
    config: CycleConfig,
    rows: pd.DataFrame,
    risk_factors: list[str],
    stop_on_missing: dict[str, bool],
    c_where: str,
    problems: list[Problem],
    warnings: list[str],
) -> None:
    """Outcomes, supplied expected values and risk factors hold values the fits can use."""
    patient_measures = [m for m in config.measures if not m.summary]
    for m in patient_measures:
        check_outcome(rows, m.outcome, m.type, c_where, problems)
        if m.expected_column:
            check_expected(rows, m.expected_column, m.type, c_where, problems)
    if patient_measures:
        check_comparable(config, rows, config.inputs.unit_column, c_where, problems)
    looks_identifying = [str(c) for c in rows.columns if IDENTIFIER.search(str(c))]
    if looks_identifying:
        warnings.append(
            f"{c_where}: column(s) {', '.join(looks_identifying)} look like direct "
            "identifiers. fairgauge does not use "
            "or publish them, but they should not be in the extract at all: remove them at the "
            "source."
        )
    for v in dict.fromkeys(risk_factors):
        check_risk_factor(rows, v, c_where, problems, stop_on_missing[v], warnings)


def _hashes(inputs, provenance: dict) -> dict[str, str]:
    """SHA-256 of each input file, or of the rows read from the database (order-free)."""
    hashes = {}
    for name, path in (("cohort", inputs.cohort), ("units", inputs.units)):
        if name in provenance:
            hashes[f"database {name}"] = provenance[name]["rows_sha256"]
        elif path is not None:
            hashes[path.name] = file_sha256(path)
    return hashes


def _check_targets(
    config: CycleConfig,
    rows: pd.DataFrame,
    units: pd.DataFrame,
    unit_tables: dict[str, pd.DataFrame | None],
    attributes: pd.DataFrame,
    u_where: str,
    problems: list[Problem],
) -> None:
    """Each measure's ``pull_towards`` predictors can be built from the unit table."""
    unit_col = config.inputs.unit_column
    for i, m in enumerate(config.measures):
        if not m.pull_towards:
            continue
        if m.summary:
            summary = unit_tables.get(m.key)
            cases = summary["cases"] if summary is not None else None
            present = cases.index if cases is not None else units.index[:0]
        else:
            cases = rows[unit_col].value_counts()
            present = pd.Index([u for u in units.index if u in cases.index])
        for text in check_targets(
            tuple(m.pull_towards),
            m.key,
            attributes,
            units["kind"].astype("string"),
            present,
            has_patients=not m.summary,
            has_risk=m.casemix.strip() != "1" or bool(m.expected_column),
            cases=cases,
        ):
            problems.append(Problem(f"measures[{i}].pull_towards ({u_where})", text))


def _idle_units(
    row_units: pd.Series,
    unit_ids: pd.Index,
    unit_tables: dict[str, pd.DataFrame | None],
    u_where: str,
) -> list[str]:
    """A warning naming the units with no cases on any measure (listed without results)."""
    idle = unit_ids[~unit_ids.isin(units_with_cases(row_units, unit_tables))]
    if not len(idle):
        return []
    return [
        f"{len(idle)} unit(s) in {u_where} have no cases this cycle and are listed without "
        f"results: {', '.join(idle[:5])}."
    ]
