"""Unit-level input: per unit its cases, observed events and expected events, from a file or
the database, for measures whose patient rows never leave the units.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from pipeline.config import CycleConfig
from pipeline.errors import InputError, Problem
from pipeline.inputs.tables import TOO_LARGE, file_sha256, read_table, row_list
from pipeline.inputs.warehouse import read_query


def totals_from_database(inputs, summary: str) -> bool:
    """A measure's ``summary`` is a database query or table when a database is configured and it is
    not a data file."""
    return bool(inputs.database) and not summary.strip().lower().endswith(
        (".csv", ".parquet", ".pq")
    )


def load_unit_totals(
    path: Path,
    observed: str,
    unit_col: str,
    unit_ids: pd.Index,
    problems: list[Problem],
    frame: pd.DataFrame | None = None,
) -> pd.DataFrame | None:
    """Unit-level input of one measure: per unit its cases, observed events and expected events
    (``frame``: rows already read)."""
    where = str(path)
    if frame is None:
        try:
            frame = read_table(path, text_columns=(unit_col,))
        except InputError as exc:
            problems.extend(exc.problems)
            return None
    columns = {
        unit_col: "the unit id",
        "cases": "patients counted",
        observed: "observed events",
        "expected": "expected events",
    }
    absent = [c for c in columns if c not in frame.columns]
    for c in absent:
        problems.append(
            Problem(
                f"{where}, column '{c}'",
                f"is missing ({columns[c]}). A unit summary needs columns {', '.join(columns)}.",
            )
        )
    if absent:
        return None
    ids = frame[unit_col].astype("string").str.strip()
    _check_unit_ids(ids, unit_ids, f"{where}, column '{unit_col}'", problems)
    cases, events, expected = _check_numbers(frame, observed, where, problems)
    return pd.DataFrame(
        {"cases": cases.to_numpy(), "observed": events.to_numpy(), "expected": expected.to_numpy()},
        index=pd.Index(ids, name="id"),
    )


def _check_unit_ids(
    ids: pd.Series, unit_ids: pd.Index, column: str, problems: list[Problem]
) -> None:
    """Every unit id is in the unit table, and appears once."""
    unknown = ~ids.isin(unit_ids)
    if unknown.any():
        problems.append(
            Problem(
                column,
                f"has unit ids not in the unit table, such as '{ids[unknown].iloc[0]}', at "
                f"{row_list(unknown)}.",
            )
        )
    dup = ids.duplicated(keep=False)
    if dup.any():
        problems.append(
            Problem(
                column,
                f"repeats unit ids at {row_list(dup)}; each unit appears once in a unit summary.",
            )
        )


def _check_numbers(
    frame: pd.DataFrame, observed: str, where: str, problems: list[Problem]
) -> tuple[pd.Series, pd.Series, pd.Series]:
    """Cases, observed events and expected events are numbers a unit can have: (the three)."""
    numbers = {c: pd.to_numeric(frame[c], errors="coerce") for c in ("cases", observed, "expected")}
    cases, events, expected = numbers["cases"], numbers[observed], numbers["expected"]
    checks = [
        (
            "cases",
            ~((cases >= 1) & (cases < TOO_LARGE) & (cases == cases.round())),
            f"must be a whole number from 1 to below {TOO_LARGE:g}",
        ),
        (
            observed,
            ~((events >= 0) & (events == events.round()) & (events <= cases)),
            "must be a whole number from 0 to the unit's cases",
        ),
        (
            "expected",
            ~((expected > 0) & (expected < cases)),
            "must be a number above 0 and below the unit's cases",
        ),
    ]
    for column, bad, allowed in checks:
        if bad.any():
            problems.append(
                Problem(
                    f"{where}, column '{column}'",
                    f"{allowed}; found '{frame[column][bad].iloc[0]}' at {row_list(bad)}.",
                )
            )
    if events.sum() <= 0 or events.sum() >= cases.sum():
        problems.append(
            Problem(
                f"{where}, column '{observed}'",
                "needs at least one event and one non-event across the network to compare units.",
            )
        )
    return cases, events, expected


def read_unit_totals(
    config: CycleConfig,
    unit_ids: pd.Index,
    provenance: dict,
    hashes: dict[str, str],
    problems: list[Problem],
) -> dict[str, pd.DataFrame | None]:
    """Every measure's unit totals (``summary``), from its file or the database; None where they
    could not be read. Records where each came from in ``provenance`` and ``hashes``."""
    inputs = config.inputs
    unit_col = inputs.unit_column
    unit_tables: dict[str, pd.DataFrame | None] = {}
    for i, m in enumerate(config.measures):
        if m.summary and totals_from_database(inputs, m.summary):
            where = f"database unit totals of measure '{m.key}' (measures[{i}].summary)"
            query = m.summary
            if query.strip().lower().endswith(".sql"):
                sql_file = (config.source.parent / query.strip()).resolve()
                if not sql_file.is_file():
                    problems.append(
                        Problem(
                            f"measures[{i}].summary",
                            f"names the SQL file {sql_file}, which does not exist.",
                        )
                    )
                    continue
                query = sql_file.read_text(encoding="utf-8")
            try:
                frame, origin = read_query(
                    inputs.database,
                    query,
                    where,
                    inputs.statement_timeout,
                    text_columns=(unit_col,),
                )
            except InputError as exc:
                problems.extend(exc.problems)
                continue
            provenance[f"summary {m.key}"] = origin.as_dict()
            unit_tables[m.key] = load_unit_totals(
                Path(where), m.outcome, unit_col, unit_ids, problems, frame=frame
            )
            hashes[f"database summary {m.key}"] = origin.rows_sha256
        elif m.summary:
            path = (config.source.parent / m.summary).resolve()
            unit_tables[m.key] = load_unit_totals(path, m.outcome, unit_col, unit_ids, problems)
            hashes[path.name] = file_sha256(path) if path.is_file() else ""
    return unit_tables
