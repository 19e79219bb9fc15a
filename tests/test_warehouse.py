"""Reading the cohort and the unit table from PostgreSQL, against a real server the tests start and
stop.

The server is Debian's ``postgresql`` (installed by tests/setup.sh), a throwaway cluster
(tests/postgres_server.py). A role with SELECT rights only reads tables loaded by the superuser.
"""

from __future__ import annotations

import json
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from pipeline.config import load_config
from pipeline.errors import ConfigError, InputError
from pipeline.inputs.data import load_cohort

from .postgres_server import free_port, throwaway_server

pytestmark = pytest.mark.db

READER_PASSWORD = "reader-Secret-7391"


@pytest.fixture(scope="session")
def server():
    """A running PostgreSQL cluster with a read-only role and an empty database: (port, superuser
    connect)."""
    with throwaway_server() as (port, connect):
        with connect() as c, c.cursor() as cur:
            cur.execute(f"CREATE ROLE fg_reader LOGIN PASSWORD '{READER_PASSWORD}'")
            cur.execute("CREATE DATABASE warehouse")
        yield port, connect


def _load(connect, name: str, frame: pd.DataFrame) -> None:
    import pyarrow as pa

    with connect("warehouse") as c, c.cursor() as cur:
        cur.execute(f'DROP TABLE IF EXISTS "{name}"')
        cur.adbc_ingest(name, pa.Table.from_pandas(frame, preserve_index=False), mode="create")
        cur.execute(f'GRANT SELECT ON "{name}" TO fg_reader')


def _network(seed: int = 3, units: int = 12):
    """An invented network: a unit table and a cohort with one binary outcome and two risk
    factors."""
    rng = np.random.default_rng(seed)
    ids = [f"u{i:02d}" for i in range(units)]
    names = [f"Unit {i}" for i in range(units)]
    # quotes and non-ASCII
    names[0], names[1] = 'St. Mary\'s "North" Ward', "Clínica Þórsmörk – Süd"
    unit_table = pd.DataFrame(
        {"id": ids, "name": names, "kind": ["hospital", "clinic"] * (units // 2)}
    )
    size = rng.integers(60, 300, units)
    unit = np.repeat(ids, size)
    age = rng.integers(40, 90, len(unit))
    frail = rng.integers(0, 2, len(unit))
    p = 1 / (1 + np.exp(-(-3 + 0.03 * (age - 65) + 0.6 * frail)))
    cohort = pd.DataFrame(
        {
            "stay_id": [f"s{i}" for i in range(len(unit))],
            "unit_id": unit,
            "age": age,
            "frail": frail,
            "readmit": (rng.random(len(unit)) < p).astype(int),
        }
    )
    return unit_table, cohort


def _config(folder: Path, inputs: str, **sampler) -> Path:
    text = textwrap.dedent(f"""
        [cycle]
        title = "Warehouse test network (invented)"
        publisher = "Test publisher"
        period = "Test period"
        output = "site"
        renderer = "builtin"
        invented_data = true

        [inputs]
        unit_column = "unit_id"
        record_column = "stay_id"
        {inputs}

        [sampler]
        chains = 4
        draws = 1000
        tune = 1000

        [[measures]]
        key = "readmit"
        name = "Readmission"
        definition = "Patients admitted again within 30 days (invented)."
        outcome = "readmit"
        type = "binary"
        better = "lower"
        casemix = "age + frail"
    """)
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "cycle.toml").write_text(text, encoding="utf-8")
    return folder / "cycle.toml"


def _db_inputs(port: int, cohort: str = "cohort", units: str = "units", timeout: float = 30) -> str:
    return (
        f'database = "host=127.0.0.1 port={port} dbname=warehouse user=fg_reader"\n'
        f'cohort_query = """{cohort}"""\nunits_query = """{units}"""\nstatement_timeout = {timeout}'
    )


@pytest.fixture()
def reader(monkeypatch):
    monkeypatch.setenv("PGPASSWORD", READER_PASSWORD)  # the usual libpq place; never in the config


def test_a_password_in_the_config_is_refused_without_being_shown(tmp_path):
    for conninfo in (
        "host=db user=x password=hunter2-secret",
        "postgresql://x:hunter2-secret@db/warehouse",
    ):
        path = _config(
            tmp_path, f'database = "{conninfo}"\ncohort_query = "cohort"\nunits_query = "units"'
        )
        with pytest.raises(ConfigError) as caught:
            load_config(path)
        assert "inputs.database: contains a password" in str(caught.value) and "hunter2" not in str(
            caught.value
        )


def test_queries_need_a_connection_and_exclude_files(tmp_path):
    path = _config(
        tmp_path, 'units = "units.csv"\nunits_query = "units"\ncohort_query = "missing.sql"'
    )
    with pytest.raises(ConfigError) as caught:
        load_config(path)
    text = str(caught.value)
    assert "inputs.units_query: is set together with inputs.units" in text
    assert "inputs.cohort_query: needs inputs.database" in text and "names the SQL file" in text


@pytest.mark.slow
def test_a_cycle_read_from_the_database_publishes_what_the_csv_export_does(
    server, reader, tmp_path
):
    port, connect = server
    units, cohort = _network()
    _load(connect, "units", units)
    _load(connect, "cohort", cohort)
    files = tmp_path / "files"
    files.mkdir()
    units.to_csv(files / "units.csv", index=False)
    cohort.to_csv(files / "cohort.csv", index=False)
    from pipeline.cycle import run_cycle

    run_cycle(load_config(_config(files, 'units = "units.csv"\ncohort = "cohort.csv"')))
    (tmp_path / "db").mkdir()
    (tmp_path / "db" / "cohort.sql").write_text(
        "SELECT stay_id, unit_id, age, frail, readmit\nFROM cohort\n", encoding="utf-8"
    )
    db_config = load_config(_config(tmp_path / "db", _db_inputs(port, cohort="cohort.sql")))
    run_cycle(db_config)
    csv_results = (files / "site" / "downloads" / "results.csv").read_bytes()
    assert (tmp_path / "db" / "site" / "downloads" / "results.csv").read_bytes() == csv_results
    manifest = (tmp_path / "db" / "site" / "fairgauge-manifest.json").read_text(encoding="utf-8")
    origin = json.loads(manifest)["database"]
    assert (
        origin["cohort"]["database"] == "warehouse"
        and origin["cohort"]["rows"] == len(cohort)
        and origin["units"]["rows"] == len(units)
    )
    assert (
        origin["cohort"]["server_version"][:2].isdigit()
        and len(origin["cohort"]["query_sha256"]) == 64
    )
    # no credentials, not even the role
    assert READER_PASSWORD not in manifest and "fg_reader" not in manifest
    for page in (tmp_path / "db" / "site").rglob("*.html"):
        assert READER_PASSWORD not in page.read_text(encoding="utf-8")
    # The same rows in another order have the same hash, so the cached fits are reused; a changed
    # row refits.
    first = load_cohort(db_config).sha256
    _load(connect, "cohort", cohort.sample(frac=1.0, random_state=1))
    assert load_cohort(db_config).sha256 == first
    changed = cohort.copy()
    changed.loc[5, "readmit"] = 1 - changed.loc[5, "readmit"]
    _load(connect, "cohort", changed)
    assert load_cohort(db_config).sha256 != first
    _load(connect, "cohort", cohort)


def _problems(config_path: Path) -> str:
    with pytest.raises(InputError) as caught:
        load_cohort(load_config(config_path))
    return str(caught.value)


def test_bad_database_inputs_get_clear_errors(server, reader, tmp_path, monkeypatch):
    port, connect = server
    units, cohort = _network()
    _load(connect, "units", units)
    _load(connect, "cohort", cohort)
    bad = cohort.assign(
        readmit=np.where(np.arange(len(cohort)) == 3, "yes", cohort["readmit"].astype(str))
    )
    _load(connect, "cohort_text", bad)
    cases = {
        "no rows": (
            "SELECT * FROM cohort WHERE age > 500",
            "database cohort (inputs.cohort_query): the query returned no rows",
        ),
        "missing column": (
            "SELECT stay_id, unit_id, age, frail FROM cohort",
            "database cohort (inputs.cohort_query), column 'readmit': is missing",
        ),
        "wrong type": ("cohort_text", "column 'readmit': must be numbers; found 'yes' at row 4"),
        "syntax error": (
            "SELECT stay_id, unit_id\nFORM cohort",
            'the database refused the query: syntax error at or near "cohort" LINE 2: FORM cohort.',
        ),
        "write": (
            "INSERT INTO cohort (stay_id) VALUES ('x')",
            "the query tries to change the database, and fairgauge only reads",
        ),
        "two statements": (
            "SELECT 1; DELETE FROM cohort",
            "the query holds more than one statement",
        ),
        "timeout": (
            "SELECT *, pg_sleep(0.01) FROM cohort",
            "ran longer than the statement timeout of 1 s and was cancelled",
        ),
    }
    tried = []
    for name, (query, expected) in cases.items():
        timeout = 1 if name == "timeout" else 30
        text = _problems(
            _config(
                tmp_path / name.replace(" ", "-"), _db_inputs(port, cohort=query, timeout=timeout)
            )
        )
        assert expected in text, (name, text)
        assert READER_PASSWORD not in text
        tried.append(name)
    monkeypatch.setenv("PGPASSWORD", "not-the-password")
    text = _problems(_config(tmp_path / "password", _db_inputs(port)))
    assert (
        "cannot connect to the database" in text
        and "password authentication failed" in text
        and "not-the-password" not in text
    )
    monkeypatch.setenv("PGPASSWORD", READER_PASSWORD)
    text = _problems(_config(tmp_path / "unreachable", _db_inputs(free_port())))
    assert "cannot connect to the database" in text and "Connection refused" in text
    assert len(tried) == 7


def test_unit_names_with_quotes_and_accents_arrive_unchanged(server, reader, tmp_path):
    port, connect = server
    units, cohort = _network()
    _load(connect, "units", units)
    _load(connect, "cohort", cohort)
    read = load_cohort(load_config(_config(tmp_path, _db_inputs(port))))
    assert list(read.units["name"].iloc[:2]) == [
        'St. Mary\'s "North" Ward',
        "Clínica Þórsmörk – Süd",
    ]
    assert len(read.rows) == len(cohort) and pd.api.types.is_string_dtype(read.rows["unit_id"])
    assert set(read.provenance) == {"cohort", "units"} and read.provenance["cohort"]["rows"] == len(
        cohort
    )


def test_unit_totals_alone_from_the_database_need_no_cohort(server, reader, tmp_path):
    port, connect = server
    units, _ = _network()
    totals = pd.DataFrame(
        {
            "unit_id": units["id"],
            "cases": np.arange(100, 100 + len(units)),
            "falls": np.arange(len(units)) % 7,
            "expected": np.linspace(2.0, 6.0, len(units)),
        }
    )
    _load(connect, "units", units)
    _load(connect, "falls_totals", totals)
    text = _config(tmp_path, "").read_text(encoding="utf-8")
    text = text.replace(
        "[inputs]\n",
        f'[inputs]\ndatabase = "host=127.0.0.1 port={port} dbname=warehouse '
        'user=fg_reader"\nunits_query = "units"\n',
    )
    text = text.replace('casemix = "age + frail"', 'summary = "falls_totals"').replace(
        'outcome = "readmit"', 'outcome = "falls"'
    )
    (tmp_path / "cycle.toml").write_text(text, encoding="utf-8")
    read = load_cohort(load_config(tmp_path / "cycle.toml"))
    assert read.rows.empty and list(read.unit_tables["readmit"]["observed"]) == list(
        totals["falls"]
    )
    assert (
        set(read.provenance) == {"units", "summary readmit"}
        and "database summary readmit" in read.sha256
    )


def test_a_server_that_never_answers_fails_within_the_connect_timeout(reader, tmp_path):
    import socket
    import time

    with socket.socket() as silent:  # accepts the connection, then says nothing
        silent.bind(("127.0.0.1", 0))
        silent.listen(1)
        port = silent.getsockname()[1]
        inputs = (
            f'database = "host=127.0.0.1 port={port} dbname=warehouse user=fg_reader '
            'connect_timeout=2"\n'
            'cohort_query = "cohort"\nunits_query = "units"'
        )
        start = time.perf_counter()
        text = _problems(_config(tmp_path, inputs))
        assert time.perf_counter() - start < 10
    assert "cannot connect to the database" in text and "timeout" in text.lower(), text


def test_a_cycle_staged_from_the_database_lists_the_warehouse_records(
    server, reader, tmp_path, monkeypatch
):
    """Staging works the same with database inputs: each unit's ledger holds exactly the stay ids
    the warehouse has for that unit, and nothing is published or entered in the history."""
    from pipeline.staging.ledger import read_ledger
    from pipeline.staging.stage import stage_cycle

    from .fake_sampler import fake_run

    monkeypatch.setattr("pipeline.shrinkage.sampling.Sampler.run", fake_run)
    port, connect = server
    units, cohort = _network(seed=8)
    _load(connect, "units", units)
    _load(connect, "cohort", cohort)
    path = _config(tmp_path, _db_inputs(port))
    path.write_text(path.read_text(encoding="utf-8") + "\n[review]\nstaging = 'staged'\n")
    stage_cycle(load_config(path))
    assert not (tmp_path / "site").exists() and not (tmp_path / "history").exists()
    ledger = read_ledger(tmp_path / "staged" / "ledger.csv")
    assert (ledger["status"] == "counted").all() and len(ledger) == len(cohort)
    for unit, stays in cohort.groupby("unit_id")["stay_id"]:
        assert set(ledger.loc[ledger["unit_id"] == unit, "record_id"]) == set(stays), unit
    table = pd.read_csv(tmp_path / "staged" / "site" / "downloads" / "results.csv")
    assert set(table["unit_id"]) == set(units["id"])
