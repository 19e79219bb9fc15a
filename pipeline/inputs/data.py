"""Reading and checking a cycle's inputs: the cohort (patient rows) and the unit table.

Every check collects its problems; one :class:`~pipeline.errors.InputError` lists them all,
each naming the file, the column, the first offending rows and what is allowed.
Rows are numbered from 1 = the first data row (for a CSV, file line = row + 1).
"""

from __future__ import annotations

import difflib
import hashlib
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline.config import CycleConfig
from pipeline.errors import InputError, Problem
from pipeline.formulas import formula_variables
from pipeline.inputs.targets import check as check_targets
from pipeline.inputs.warehouse import read_query

UNIT_TABLE_COLUMNS = ("id", "name", "kind")
# Column names that suggest direct identifiers (common practice, no source: the usual
# suspects of de-identification checklists). Such columns are never carried past this module.
_IDENTIFIER = re.compile(
    r"(^|_)(name|first_?name|given_?name|surname|last_?name|family_?name|mrn|medical_?record\w*|nhs_?(no|number)?|"
    r"ssn|social_?security\w*|patient_?(id|no|number)|dob|date_?of_?birth|birth_?date|phone|telephone|mobile|"
    r"e_?mail|address|street|post_?code|zip(_?code)?)($|_)",
    re.IGNORECASE,
)
_SHOW_ROWS = 5  # offending rows quoted per problem
# a magnitude no risk factor, outcome or expected value in these reports reaches (common practice,
# no source)
TOO_LARGE = 1e12
FAR_OUT = 100  # a value this many interquartile ranges from the median is counted in a warning


@dataclass(frozen=True)
class Cohort:
    """Validated inputs of one cycle."""

    rows: pd.DataFrame  # patient rows; the unit column is text, row order as in the file
    units: pd.DataFrame  # unit table indexed by id (text), columns name, kind
    unit_column: str
    sha256: dict[str, str]  # file name -> SHA-256 of its bytes, for provenance
    warnings: tuple[str, ...]
    # measure key -> unit-level input (index unit id; cases, observed, expected)
    summaries: dict[str, pd.DataFrame | None] | None = None
    # the unit table's other columns (index unit id), for pull_towards (targets.py)
    attributes: pd.DataFrame | None = None
    # "cohort"/"units" -> where rows read from a database came from (warehouse.Provenance)
    provenance: dict | None = None

    def unit_totals(self, measure_key: str) -> pd.DataFrame:
        """The unit-level input of a measure, read from its ``summary`` file or query."""
        table = (self.summaries or {}).get(measure_key)
        if table is None:
            raise ValueError(f"{measure_key}: no unit-level input was read")
        return table


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with path.open("rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _first_non_utf8_line(path: Path) -> int:
    with path.open("rb") as fh:
        for number, line in enumerate(fh, start=1):
            try:
                line.decode("utf-8")
            except UnicodeDecodeError:
                return number
    return 0


def read_table(path: Path, text_columns: tuple[str, ...] = ()) -> pd.DataFrame:
    """Read a CSV or Parquet file; ``text_columns`` are kept as text (ids must not become
    numbers)."""
    where = str(path)
    if not path.is_file():
        raise InputError(
            [Problem(where, "file not found. Check the path in the cycle config ([inputs]).")]
        )
    suffix = path.suffix.lower()
    try:
        if suffix == ".csv":
            frame = pd.read_csv(path, dtype={c: "string" for c in text_columns}, encoding="utf-8")
        elif suffix in (".parquet", ".pq"):
            frame = pd.read_parquet(path)
            for c in text_columns:
                if c in frame.columns:
                    frame[c] = frame[c].astype("string")
        else:
            raise InputError(
                [Problem(where, f"unsupported file type '{suffix}'. Allowed: .csv, .parquet.")]
            )
    except InputError:
        raise
    except UnicodeDecodeError:
        raise InputError(
            [
                Problem(
                    where,
                    f"is not UTF-8 text (first at line {_first_non_utf8_line(path)}). Save it "
                    "as UTF-8 and run again.",
                )
            ]
        ) from None
    except pd.errors.EmptyDataError:
        raise InputError(
            [Problem(where, "is empty: it needs a header row and at least one data row.")]
        ) from None
    except Exception as exc:  # pandas/pyarrow raise many types for damaged files
        raise InputError(
            [Problem(where, f"cannot be read as {suffix[1:]} ({type(exc).__name__}: {exc}).")]
        ) from None
    if frame.empty:
        raise InputError([Problem(where, "has a header but no data rows.")])
    return frame


def _read_input(
    inputs, name: str, text_columns: tuple[str, ...], provenance: dict
) -> tuple[pd.DataFrame, str]:
    """The cohort or the unit table, from its file or from the database; (rows, how errors name
    it)."""
    query = getattr(inputs, f"{name}_query")
    if not query:
        path = getattr(inputs, name)
        return read_table(path, text_columns=text_columns), str(path)
    where = f"database {name} (inputs.{name}_query)"
    frame, origin = read_query(
        inputs.database, query, where, inputs.statement_timeout, text_columns=text_columns
    )
    provenance[name] = origin.as_dict()
    return frame, where


def _rows(mask: pd.Series | np.ndarray) -> str:
    positions = np.flatnonzero(np.asarray(mask)) + 1
    shown = ", ".join(str(p) for p in positions[:_SHOW_ROWS])
    more = len(positions) - _SHOW_ROWS
    return f"row{'s' if len(positions) > 1 else ''} {shown}" + (
        f" (and {more} more)" if more > 0 else ""
    )


def _check_units(units: pd.DataFrame, where: str, problems: list[Problem]) -> None:
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
                    f"is empty at {_rows(empty)}; every unit needs an id, a name and a kind.",
                )
            )
    dup = units["id"].duplicated(keep=False) & units["id"].notna()
    if dup.any():
        problems.append(
            Problem(
                f"{where}, column 'id'", f"repeats ids at {_rows(dup)}; each unit must appear once."
            )
        )


def _check_outcome(
    rows: pd.DataFrame, column: str, kind: str, where: str, problems: list[Problem]
) -> None:
    values = rows[column]
    missing = values.isna()
    if missing.any():
        problems.append(
            Problem(
                f"{where}, column '{column}'",
                f"has no value at {_rows(missing)}; every row needs its outcome.",
            )
        )
    numeric = pd.to_numeric(values, errors="coerce")
    not_number = numeric.isna() & ~missing
    if not_number.any():
        sample = values[not_number].iloc[0]
        problems.append(
            Problem(
                f"{where}, column '{column}'",
                f"must be numbers; found '{sample}' at {_rows(not_number)}.",
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
                    f"must be 0 or 1 for a binary measure; found {sample:g} at {_rows(bad)}.",
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
                    f"{_rows(bad)}. "
                    "For stays shorter than a day, record the fraction of a day (e.g. 0.5).",
                )
            )


def _check_expected(
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
                f"'{sample}' at {_rows(bad)}.",
            )
        )


def _check_magnitude(
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
                f"must hold finite numbers; found {sample} at {_rows(infinite)}. "
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
                f"in size) at {_rows(huge)}. Check the extract, or rescale the column.",
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
                    f"{_rows(far)}); check that they are real."
                )


def _check_risk_factor(
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
                f"has no value at {_rows(missing)}. Fill or remove those rows, or set the "
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
                    f"looks numeric but has text such as '{sample}' at {_rows(odd)}; use "
                    "numbers only, or wrap the column in C() if it is a category.",
                )
            )
    elif pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values):
        _check_magnitude(values.astype(float), column, where, problems, warnings)


def _check_comparable(
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


def load_cohort(config: CycleConfig) -> Cohort:
    """Read the unit table and the cohort named in ``config`` and check them together."""
    inputs = config.inputs
    unit_col = inputs.unit_column
    text_cols = tuple(c for c in (unit_col, inputs.record_column) if c)
    provenance: dict[str, dict] = {}
    units, u_where = _read_input(inputs, "units", ("id",), provenance)
    # every measure is read from unit totals (config.py checks this)
    if inputs.cohort is None and not inputs.cohort_query:
        rows, c_where = (
            pd.DataFrame({c: pd.Series([], dtype="string") for c in text_cols}),
            "cohort",
        )
    else:
        rows, c_where = _read_input(inputs, "cohort", text_cols, provenance)
    problems: list[Problem] = []
    warnings: list[str] = []
    _check_units(units, u_where, problems)

    needed: dict[str, str] = {unit_col: "[inputs].unit_column"}
    if inputs.record_column:
        needed[inputs.record_column] = "[inputs].record_column"
    risk_factors: list[str] = []
    stop_on_missing: dict[str, bool] = {}
    patient_measures = [m for m in config.measures if not m.summary]
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
    absent = [c for c in needed if c not in rows.columns]
    for c in absent:
        close = difflib.get_close_matches(c, [str(x) for x in rows.columns], n=1)
        hint = f" Did you mean '{close[0]}'?" if close else ""
        problems.append(
            Problem(
                f"{c_where}, column '{c}'",
                f"is missing (named by {needed[c]}).{hint} Columns present: "
                f"{', '.join(map(str, rows.columns))}.",
            )
        )
    if problems:  # later checks need these columns and a sound unit table
        raise InputError(problems)

    rows[unit_col] = rows[unit_col].astype("string").str.strip()
    units = units.assign(id=units["id"].astype("string").str.strip()).set_index("id")
    unknown = ~rows[unit_col].isin(units.index)
    if unknown.any():
        sample = rows.loc[unknown, unit_col].iloc[0]
        problems.append(
            Problem(
                f"{c_where}, column '{unit_col}'",
                f"has unit ids not in the unit table {u_where}, such as '{sample}', at "
                f"{_rows(unknown)}. Add them to the unit table or correct the ids.",
            )
        )
    if inputs.record_column:
        dup = rows[inputs.record_column].duplicated(keep=False)
        if dup.any():
            problems.append(
                Problem(
                    f"{c_where}, column '{inputs.record_column}'",
                    f"repeats record ids at {_rows(dup)}; each admission or procedure must "
                    "appear once. Remove the duplicate rows.",
                )
            )
    else:
        dup = rows.duplicated(keep=False)
        if dup.any():
            warnings.append(
                f"{c_where}: {int(dup.sum())} rows are exact copies of another row "
                f"({_rows(dup)}); set [inputs].record_column to check ids properly."
            )
    for m in patient_measures:
        _check_outcome(rows, m.outcome, m.type, c_where, problems)
        if m.expected_column:
            _check_expected(rows, m.expected_column, m.type, c_where, problems)
    if patient_measures:
        _check_comparable(config, rows, unit_col, c_where, problems)
    looks_identifying = [str(c) for c in rows.columns if _IDENTIFIER.search(str(c))]
    if looks_identifying:
        warnings.append(
            f"{c_where}: column(s) {', '.join(looks_identifying)} look like direct "
            "identifiers. fairgauge does not use "
            "or publish them, but they should not be in the extract at all: remove them at the "
            "source."
        )
    for v in dict.fromkeys(risk_factors):
        _check_risk_factor(rows, v, c_where, problems, stop_on_missing[v], warnings)
    if problems:
        raise InputError(problems)

    keep = [
        unit_col,
        *dict.fromkeys(
            [m.outcome for m in patient_measures]
            + [m.expected_column for m in patient_measures if m.expected_column]
            + risk_factors
        ),
    ]
    hashes = {}
    for name, path in (("cohort", inputs.cohort), ("units", inputs.units)):
        if name in provenance:
            # order-free hash of the rows read
            hashes[f"database {name}"] = provenance[name]["rows_sha256"]
        elif path is not None:
            hashes[path.name] = _sha256(path)
    summaries: dict[str, pd.DataFrame | None] = {}
    for i, m in enumerate(config.measures):
        if m.summary and summary_from_database(inputs, m.summary):
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
            summaries[m.key] = load_summary(
                Path(where), m.outcome, unit_col, units.index, problems, frame=frame
            )
            hashes[f"database summary {m.key}"] = origin.rows_sha256
        elif m.summary:
            path = (config.source.parent / m.summary).resolve()
            summaries[m.key] = load_summary(path, m.outcome, unit_col, units.index, problems)
            hashes[path.name] = _sha256(path) if path.is_file() else ""
    attributes = units.drop(columns=list(UNIT_TABLE_COLUMNS[1:]))
    for i, m in enumerate(config.measures):
        if not m.pull_towards:
            continue
        if m.summary:
            summary = summaries.get(m.key)
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
    if problems:
        raise InputError(problems)
    with_cases = set(rows[unit_col]) | {
        u for t in summaries.values() if t is not None for u in t.index
    }
    idle = units.index[~units.index.isin(with_cases)]
    if len(idle):
        warnings.append(
            f"{len(idle)} unit(s) in {u_where} have no cases this cycle and are listed without "
            f"results: {', '.join(idle[:5])}."
        )
    return Cohort(
        rows=rows[keep].reset_index(drop=True),
        units=units[["name", "kind"]].astype("string"),
        attributes=attributes,
        unit_column=unit_col,
        sha256=hashes,
        warnings=tuple(warnings),
        summaries=summaries,
        provenance=provenance,
    )


def summary_from_database(inputs, summary: str) -> bool:
    """A measure's ``summary`` is a database query or table when a database is configured and it is
    not a data file."""
    return bool(inputs.database) and not summary.strip().lower().endswith(
        (".csv", ".parquet", ".pq")
    )


def load_summary(
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
    unknown = ~ids.isin(unit_ids)
    if unknown.any():
        problems.append(
            Problem(
                f"{where}, column '{unit_col}'",
                f"has unit ids not in the unit table, such as '{ids[unknown].iloc[0]}', at "
                f"{_rows(unknown)}.",
            )
        )
    dup = ids.duplicated(keep=False)
    if dup.any():
        problems.append(
            Problem(
                f"{where}, column '{unit_col}'",
                f"repeats unit ids at {_rows(dup)}; each unit appears once in a unit summary.",
            )
        )
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
                    f"{allowed}; found '{frame[column][bad].iloc[0]}' at {_rows(bad)}.",
                )
            )
    if events.sum() <= 0 or events.sum() >= cases.sum():
        problems.append(
            Problem(
                f"{where}, column '{observed}'",
                "needs at least one event and one non-event across the network to compare units.",
            )
        )
    return pd.DataFrame(
        {"cases": cases.to_numpy(), "observed": events.to_numpy(), "expected": expected.to_numpy()},
        index=pd.Index(ids, name="id"),
    )
