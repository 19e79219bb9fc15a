"""Property-based fuzzing of the input stage: malformed cohort files, unit tables, unit totals and
configs.

Whatever the inputs, reading and checking them (``load_config`` then ``load_cohort``, what
``fairgauge check`` runs) ends in one of our typed errors, every problem located (a file and column,
or a config key), or it passes; and when it passes, every case-mix fit ends in a result or a typed
``FitError``, never a traceback. Each input is a valid small cycle with one to four mutations drawn
by hypothesis (wrong types, missing and extra columns, odd encodings and separators, huge, negative
and non-finite numbers, empty and duplicate ids, unknown and misspelt keys).

300 examples per property by default; ``FAIRGAUGE_FUZZ_EXAMPLES=5000 python -m pytest -m fuzz`` runs
more. The number tried is printed (``-s``).
"""

from __future__ import annotations

import os
import re
import tempfile
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.casemix.model import fit_with_design
from pipeline.config import load_config
from pipeline.errors import ConfigError, FitError, InputError
from pipeline.inputs.data import load_cohort

from .conftest import BASE_CONFIG

pytestmark = pytest.mark.fuzz
EXAMPLES = int(os.environ.get("FAIRGAUGE_FUZZ_EXAMPLES", "300"))
FUZZ = settings(
    max_examples=EXAMPLES,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
    derandomize=True,
)

CONFIG = (
    BASE_CONFIG
    + """
[reporting]
minimum_cases = 3
hide_counts_below = 3

[[measures]]
key = "stay"
name = "Length of stay"
definition = "Days in hospital."
outcome = "los"
type = "continuous"
family = "gamma"
unit_label = "days"
casemix = "age"

[[measures]]
key = "falls"
name = "Falls"
definition = "Falls on the ward."
outcome = "falls"
summary = "falls.csv"
# the shared test config (one binary measure, readmit) plus a continuous measure and unit totals
"""
)

ODD_VALUES = [
    "",
    "abc",
    "inf",
    "-inf",
    "nan",
    "NaN",
    "1e308",
    "-1e308",
    "-5",
    "0",
    "2",
    "1,5",
    "9" * 40,
    "\u00e9t\u00e9",
    "  ",
    "NULL",
    "None",
    "TRUE",
    "0x1F",
    "1e-320",
    "\u2212" + "3",
    "3.0",
    "1 000",
]


def _valid() -> dict[str, pd.DataFrame]:
    rng = np.random.default_rng(3)
    n = 24
    units = pd.DataFrame(
        {
            "id": ["a1", "b2", "c3"],
            "name": ["Unit A", "Unit B", "Unit C"],
            "kind": ["hospital", "clinic", "clinic"],
        }
    )
    cohort = pd.DataFrame(
        {
            "stay_id": [f"s{i}" for i in range(n)],
            "unit_id": np.resize(["a1", "b2", "c3"], n),
            "age": rng.integers(30, 90, n),
            "sex": rng.choice(["F", "M"], n),
            "readmit": np.resize([0, 1, 0, 0], n),
            "los": np.round(rng.uniform(0.5, 12, n), 1),
        }
    )
    falls = pd.DataFrame(
        {
            "unit_id": ["a1", "b2", "c3"],
            "cases": [300, 200, 150],
            "falls": [12, 5, 9],
            "expected": [10.5, 6.0, 7.2],
        }
    )
    return {"cohort": cohort, "units": units, "falls": falls}


ODD_NUMBERS = [
    "inf",
    "-inf",
    "1e308",
    "-1e308",
    "-5",
    "0",
    "1e-320",
    "nan",
    "9" * 40,
    "0.5",
    "1e12",
    "-0",
]
NUMBER_COLUMNS = {
    "cohort": ["age", "readmit", "los"],
    "falls": ["cases", "falls", "expected"],
    "units": ["id"],
}


def _mutation(tables: list[str]):
    """One mutation: (kind, table, column index, row index, value index, text)."""
    return st.tuples(
        st.sampled_from(
            [
                "number",
                "number",
                "number",
                "cell",
                "cell",
                "drop_column",
                "extra_column",
                "rename_column",
                "duplicate_row",
                "empty_table",
                "header_only",
                "blank_id",
            ]
        ),
        st.sampled_from(tables),
        st.integers(0, 10),
        st.integers(0, 30),
        st.integers(0, len(ODD_VALUES) - 1),
        st.text(min_size=0, max_size=6),
    )


def _apply(tables: dict[str, pd.DataFrame], mutation) -> None:
    kind, name, col, row, value, text = mutation
    t = tables[name].astype(object)
    column = t.columns[col % len(t.columns)]
    if kind == "number" and len(t):  # an odd number in a column a measure reads as a number
        target = NUMBER_COLUMNS[name][col % len(NUMBER_COLUMNS[name])]
        if target in t.columns:
            t.loc[t.index[row % len(t)], target] = ODD_NUMBERS[value % len(ODD_NUMBERS)]
    elif kind == "cell" and len(t):
        t.iloc[row % len(t), col % len(t.columns)] = ODD_VALUES[value]
    elif kind == "drop_column":
        t = t.drop(columns=[column])
    elif kind == "extra_column":
        t[f"extra_{text}"] = ODD_VALUES[value]
    elif kind == "rename_column":
        t = t.rename(columns={column: str(column)[:-1] or "x"})
    elif kind == "duplicate_row" and len(t):
        t = pd.concat([t, t.iloc[[row % len(t)]]], ignore_index=True)
    elif kind == "empty_table" or kind == "header_only":
        t = t.iloc[0:0]
    elif kind == "blank_id" and len(t):
        t.iloc[row % len(t), 0] = ""
    tables[name] = t


FILE_FORMS = st.sampled_from(
    ["utf-8", "utf-8", "utf-8-sig", "latin-1", "semicolon", "tab", "truncated", "empty", "binary"]
)


def _write(folder: Path, tables: dict[str, pd.DataFrame], forms: dict[str, str]) -> None:
    for name, t in tables.items():
        path = folder / f"{name}.csv"
        form = forms.get(name, "utf-8")
        if form == "empty":
            path.write_bytes(b"")
        elif form == "binary":
            path.write_bytes(bytes(range(256)) * 3)
        else:
            sep = {"semicolon": ";", "tab": "\t"}.get(form, ",")
            text = t.to_csv(index=False, sep=sep)
            if form == "truncated":
                text = text[: max(1, len(text) * 2 // 3)]
            encoding = {"latin-1": "latin-1", "utf-8-sig": "utf-8-sig"}.get(form, "utf-8")
            path.write_bytes(
                text.replace("\u2212", "-").encode(encoding, errors="replace")
                if encoding == "latin-1"
                else text.encode(encoding)
            )


def _located(problems) -> bool:
    return all(str(p.where).strip() and str(p.message).strip() for p in problems)


def _run(folder: Path) -> str:
    """What ``check`` and the case-mix fits do with the folder's inputs: 'config', 'input', 'fit'
    (typed errors) or 'ok'."""
    try:
        config = load_config(folder / "cycle.toml")
    except ConfigError as exc:
        assert exc.problems and _located(exc.problems), exc
        return "config"
    try:
        cohort = load_cohort(config)
    except InputError as exc:
        assert exc.problems and _located(exc.problems), exc
        for p in exc.problems:  # data problems name the file (and column), config problems the key
            assert str(folder) in p.where or re.match(
                r"^[a-z_]+(\[\d+\])?(\.[a-z_]+)*( |$|\()", p.where
            ), p
        return "input"
    present = set(cohort.rows[cohort.unit_column])
    fitted = [u for u in cohort.units.index if u in present]
    codes = pd.Categorical(cohort.rows[cohort.unit_column], categories=fitted).codes.astype(
        np.int64
    )
    outcome = "ok"
    for m in config.measures:
        if m.summary:
            continue
        try:
            fit_with_design(m, cohort.rows, codes)
        except FitError as exc:
            assert str(exc).startswith(f"measure '{m.key}'"), exc
            outcome = "fit"
    return outcome


TRIED: dict[str, dict[str, int]] = {}


def _count(test: str, outcome: str) -> None:
    TRIED.setdefault(test, {}).setdefault(outcome, 0)
    TRIED[test][outcome] += 1


@FUZZ
@given(
    mutations=st.lists(_mutation(["cohort", "units", "falls"]), min_size=1, max_size=4),
    forms=st.dictionaries(st.sampled_from(["cohort", "units", "falls"]), FILE_FORMS, max_size=2),
)
def test_malformed_input_files_end_in_a_located_error_or_pass(mutations, forms):
    tables = _valid()
    for m in mutations:
        _apply(tables, m)
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        (folder / "cycle.toml").write_text(textwrap.dedent(CONFIG), encoding="utf-8")
        _write(folder, tables, forms)
        _count("files", _run(folder))


CONFIG_EDITS = [
    (
        "minimum_cases = 3",
        [
            "minimum_cases = -1",
            'minimum_cases = "three"',
            "minimum_case = 3",
            "minimum_cases = 1e9",
            "minimum_cases = 3.5",
        ],
    ),
    (
        "hide_counts_below = 3",
        [
            "hide_counts_below = 2",
            "hide_counts_below = 50",
            "hide_count_below = 3",
            "hide_counts_below = true",
        ],
    ),
    ('type = "continuous"', ['type = "continous"', "type = 3", 'type = ""']),
    ('family = "gamma"', ['family = "gama"', 'family = "normal"', "family = []"]),
    (
        'casemix = "age + C(sex)"',
        [
            'casemix = "age +"',
            'casemix = "ag + C(sex)"',
            'casemix = "C(age"',
            'casemix = ""',
            'casemix = "age ** 2"',
        ],
    ),
    ('outcome = "readmit"', ['outcome = "readmt"', "outcome = 1", 'outcome = ""']),
    ('key = "readmit"', ['key = "stay"', 'key = "re admit"', 'key = ""', 'key = "../x"']),
    ('summary = "falls.csv"', ['summary = "nofile.csv"', 'summary = "falls.txt"', "summary = 0"]),
    (
        "[reporting]",
        [
            "[reportin]",
            "[reporting]\ninterval = 2",
            '[reporting]\nbenchmark = "somewhere"',
            "[reporting]\nbenchmark = 1.5",
        ],
    ),
    (
        'renderer = "builtin"',
        ['renderer = "quartoo"', "renderer = 1", 'renderer = "builtin"\nrenderer = "quarto"'],
    ),
    ('record_column = "stay_id"', ['record_column = "stay"', "record_column = 5"]),
    ("[inputs]", ["[inputs]\nunknown = 1", "[input]"]),
    ('title = "Test network"', ['title = ""', 'title = """', "title = 3"]),
]


@FUZZ
@given(
    edits=st.lists(
        st.tuples(st.integers(0, len(CONFIG_EDITS) - 1), st.integers(0, 10)), min_size=1, max_size=4
    )
)
def test_malformed_configs_end_in_a_located_error_or_pass(edits):
    text = textwrap.dedent(CONFIG)
    for which, variant in edits:
        anchor, variants = CONFIG_EDITS[which]
        text = text.replace(anchor, variants[variant % len(variants)], 1)
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        (folder / "cycle.toml").write_text(text, encoding="utf-8")
        _write(folder, _valid(), {})
        _count("configs", _run(folder))


def test_report_how_many_inputs_were_tried():
    """Runs after the two properties in this file (pytest keeps file order): prints what they
    tried."""
    print(
        {k: dict(sorted(v.items())) for k, v in TRIED.items()},
        f"({EXAMPLES} examples per property)",
    )
    for name in ("files", "configs"):
        if name in TRIED:
            assert sum(TRIED[name].values()) >= min(EXAMPLES, 100)
