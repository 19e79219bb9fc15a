"""Reading the cohort and the unit table from a PostgreSQL database instead of files.

The connection is a libpq connection string (``host=... dbname=... user=...``, a URI, or
``service=name``); the password never lives in the config: libpq takes it from ``PGPASSWORD``,
the password file (``~/.pgpass``) or the service file, and a connection string that carries one is
refused (``config.has_password``) without being echoed. Each read:

* runs in read-only transactions (``SET SESSION CHARACTERISTICS AS TRANSACTION READ ONLY``) with a
  ``statement_timeout``, through one prepared statement, so a query cannot write and cannot
  smuggle a second statement;
* streams the rows into Arrow through the server's binary COPY (ADBC's PostgreSQL driver), so
  memory is the columns kept, not a driver's Python objects;
* records where the rows came from: server version, database, the query's SHA-256, the row count
  and a SHA-256 of the rows that does not depend on their order (the fit cache keys on it).

Errors become :class:`~pipeline.errors.InputError` problems naming the source (cohort or units),
with the server's message (which names the query's line for a syntax error), never credentials.
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipeline.errors import InputError, Problem

CONNECT_TIMEOUT = 10  # seconds libpq waits for a server before giving up (connect_timeout)
_TABLE_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_$]*(\.[A-Za-z_][A-Za-z0-9_$]*)?$")


@dataclass(frozen=True)
class Provenance:
    """Where one table of rows came from, for the manifest and the cache key."""

    server_version: str
    database: str
    query_sha256: str
    rows: int
    rows_sha256: str

    def as_dict(self) -> dict:
        return {
            "server_version": self.server_version,
            "database": self.database,
            "query_sha256": self.query_sha256,
            "rows": self.rows,
            "rows_sha256": self.rows_sha256,
        }


def query_text(source: str) -> str:
    """SQL for ``source``: a query as given, or, for a table name, a SELECT of all its columns."""
    source = source.strip()
    if _TABLE_NAME.match(source):
        name = ".".join(f'"{part}"' for part in source.split("."))
        return f"SELECT * FROM {name}"
    return source


def rows_sha256(frame: pd.DataFrame) -> str:
    """SHA-256 over the column names, their types and the rows, the same in any row order."""
    digest = hashlib.sha256()
    digest.update(repr([(str(c), str(t)) for c, t in frame.dtypes.items()]).encode())
    row_hashes = pd.util.hash_pandas_object(frame, index=False, categorize=False).to_numpy(
        np.uint64
    )
    digest.update(str(len(frame)).encode())
    # sum mod 2^64: order-free
    digest.update(int(row_hashes.sum(dtype=np.uint64)).to_bytes(8, "little"))
    digest.update(
        int(np.bitwise_xor.reduce(row_hashes) if len(row_hashes) else 0).to_bytes(8, "little")
    )
    return digest.hexdigest()


def _with_timeout(conninfo: str) -> str:
    if "connect_timeout" in conninfo or "://" in conninfo:
        return conninfo
    return f"{conninfo} connect_timeout={CONNECT_TIMEOUT}"


def _clean(message: str, conninfo: str) -> str:
    """The server's or driver's message without the driver's prefixes and never the connection
    string."""
    text = message.replace(conninfo, "<connection>")
    text = re.sub(r"^[A-Z_]+: (\[libpq\] )?", "", text)
    text = re.sub(r"\s*\. SQLSTATE: \w+$", "", text.strip())
    text = re.sub(r"\n\nQuery was: .*\Z", "", text, flags=re.S)
    text = re.sub(
        r"^(Failed to connect: |Failed to (prepare|execute) query( '.*?')?: |Execution error "
        r"\[\w+\]: )",
        "",
        text,
        flags=re.S,
    )
    # no caret-only lines
    lines = [
        line.strip() for line in text.splitlines() if line.strip() and set(line.strip()) != {"^"}
    ]
    return re.sub(r"^ERROR:\s+", "", " ".join(lines))


def read_query(
    conninfo: str,
    source: str,
    where: str,
    timeout_seconds: float,
    text_columns: tuple[str, ...] = (),
) -> tuple[pd.DataFrame, Provenance]:
    """Rows of ``source`` (a query or a table name) as a DataFrame, and where they came from.

    ``where`` names the source in errors ("database cohort (inputs.cohort_query)");
    ``text_columns`` are kept as text, as for files.
    """
    pg = _driver(where)
    sql = query_text(source)
    connection = _connect(pg, conninfo, where)
    try:
        cursor = connection.cursor()
        cursor.execute("SET SESSION CHARACTERISTICS AS TRANSACTION READ ONLY")
        cursor.execute(f"SET statement_timeout = {int(timeout_seconds * 1000)}")
        cursor.execute("SELECT current_setting('server_version'), current_database()")
        server_version, database = cursor.fetchone()
        try:
            cursor.execute(sql)
            # record batches from the binary COPY, in Arrow buffers
            table = cursor.fetch_arrow_table()
        except Exception as exc:
            raise InputError(
                [Problem(where, _query_problem(str(exc), conninfo, timeout_seconds))]
            ) from None
    finally:
        connection.close()
    frame = _to_pandas(table, text_columns)
    if frame.empty:
        raise InputError(
            [
                Problem(
                    where,
                    "the query returned no rows. Check its WHERE clause and the reporting period.",
                )
            ]
        )
    provenance = Provenance(
        str(server_version),
        str(database),
        hashlib.sha256(sql.encode()).hexdigest(),
        len(frame),
        rows_sha256(frame),
    )
    return frame, provenance


def _driver(where: str):
    """The PostgreSQL ADBC driver (the database extra), or a located error naming the extra."""
    try:
        import adbc_driver_postgresql.dbapi as pg
    except ImportError:  # pragma: no cover - depends on the installation
        raise InputError(
            [
                Problem(
                    where,
                    "reading from a database needs the database extra: pip install "
                    "'fairgauge[database]'.",
                )
            ]
        ) from None
    return pg


def _connect(pg, conninfo: str, where: str):
    """An autocommit ADBC connection, or a located error that never shows the connection string."""
    try:
        return pg.connect(_with_timeout(conninfo), autocommit=True)
    except Exception as exc:  # the driver raises several types; all mean "could not connect"
        raise InputError(
            [
                Problem(
                    where,
                    f"cannot connect to the database: {_clean(str(exc), conninfo)}. Check the "
                    "connection "
                    "string, that the server is running, and the password in PGPASSWORD, "
                    "~/.pgpass or the service file.",
                )
            ]
        ) from None


def _to_pandas(table, text_columns: tuple[str, ...]) -> pd.DataFrame:
    """Arrow to pandas, freeing each Arrow buffer as soon as it is converted (lower peak memory);
    ids as text."""
    frame = table.to_pandas(self_destruct=True, split_blocks=True)
    for c in text_columns:
        # Arrow text is already text
        if c in frame.columns and not pd.api.types.is_string_dtype(frame[c]):
            frame[c] = frame[c].astype("string")
    return frame


def _query_problem(message: str, conninfo: str, timeout_seconds: float) -> str:
    text = _clean(message, conninfo)
    if "statement timeout" in text:
        return (
            f"the query ran longer than the statement timeout of {timeout_seconds:g} s and was "
            "cancelled. Make it cheaper, "
            "or raise [inputs].statement_timeout."
        )
    if "read-only transaction" in text:
        return f"the query tries to change the database, and fairgauge only reads: {text}."
    if "multiple commands" in text:
        return "the query holds more than one statement; give one SELECT (or a table name)."
    return f"the database refused the query: {text}."
