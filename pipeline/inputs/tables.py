"""Reading one input table (CSV or Parquet file, or a database query) and naming its rows.

Rows are numbered from 1 = the first data row (for a CSV, file line = row + 1).
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline.errors import InputError, Problem
from pipeline.inputs.warehouse import read_query

_SHOW_ROWS = 5  # offending rows quoted per problem


# a magnitude no risk factor, outcome or expected value in these reports reaches (common practice,
# no source)
TOO_LARGE = 1e12


def file_sha256(path: Path) -> str:
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


def read_input(
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


def row_list(mask: pd.Series | np.ndarray) -> str:
    positions = np.flatnonzero(np.asarray(mask)) + 1
    shown = ", ".join(str(p) for p in positions[:_SHOW_ROWS])
    more = len(positions) - _SHOW_ROWS
    return f"row{'s' if len(positions) > 1 else ''} {shown}" + (
        f" (and {more} more)" if more > 0 else ""
    )
