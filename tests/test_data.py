"""Input checks: one folder per bad-input scenario, exact messages (file, column, rows, what is
allowed)."""

from __future__ import annotations

import shutil
from pathlib import Path

import pandas as pd
import pytest

from pipeline.config import load_config
from pipeline.errors import InputError
from pipeline.formulas import formula_variables
from pipeline.inputs.data import load_cohort

from .conftest import BASE_CONFIG

SCENARIOS = Path(__file__).parent / "bad_inputs"


@pytest.mark.parametrize("scenario", sorted(p.name for p in SCENARIOS.iterdir() if p.is_dir()))
def test_bad_input_gives_exact_message(scenario, tmp_path):
    for f in (SCENARIOS / scenario).iterdir():
        shutil.copy(f, tmp_path / f.name)
    cohort_file = "cohort.parquet" if (tmp_path / "cohort.parquet").exists() else "cohort.csv"
    if not (SCENARIOS / scenario / "cycle.toml").exists():  # a scenario may bring its own config
        (tmp_path / "cycle.toml").write_text(
            BASE_CONFIG.replace('"cohort.csv"', f'"{cohort_file}"')
        )
    config = load_config(tmp_path / "cycle.toml")
    expected = (
        (SCENARIOS / scenario / "expected.txt")
        .read_text()
        .strip()
        .format(
            cohort=tmp_path / cohort_file,
            units=tmp_path / "units.csv",
            summary=tmp_path / "summary.csv",
        )
    )
    with pytest.raises(InputError) as caught:
        load_cohort(config)
    found = [str(p) for p in caught.value.problems]
    # exact, or its opening where a library's words follow
    assert any(f.startswith(expected) for f in found), found


def test_valid_input_keeps_only_needed_columns_and_hashes_files(cycle_folder):
    cohort = load_cohort(load_config(cycle_folder()))
    # the record id is not carried on
    assert list(cohort.rows.columns) == ["unit_id", "readmit", "age", "sex"]
    assert list(cohort.units.index) == ["a1", "b2"]
    assert set(cohort.sha256) == {"cohort.csv", "units.csv"}
    assert cohort.warnings == ()


def test_unit_ids_stay_text_and_idle_units_warn(cycle_folder):
    import pandas as pd

    from .conftest import small_cohort

    units, rows = small_cohort()
    units = pd.concat([units, pd.DataFrame({"id": ["007"], "name": ["Idle"], "kind": ["clinic"]})])
    rows["unit_id"] = rows["unit_id"].replace({"b2": "007"})
    cohort = load_cohort(load_config(cycle_folder(units=units.iloc[[0, 2]], cohort=rows)))
    assert "007" in set(cohort.rows["unit_id"])  # not turned into the number 7
    units_all = pd.concat(
        [units.iloc[[0, 2]], pd.DataFrame({"id": ["x9"], "name": ["Spare"], "kind": ["clinic"]})]
    )
    cohort = load_cohort(load_config(cycle_folder(units=units_all, cohort=rows)))
    assert cohort.warnings[0].startswith("1 unit(s) in ") and cohort.warnings[0].endswith(
        "have no cases this cycle and are listed without results: x9."
    )


def test_formula_variables_skip_function_names():
    assert formula_variables("C(age_band) + np.log(weight) + a:b + bs(age, df=3)") == [
        "age_band",
        "weight",
        "a",
        "b",
        "age",
    ]
    with pytest.raises(ValueError, match="is not a valid formula"):
        formula_variables("age +")


def test_a_value_far_from_the_rest_is_counted_in_a_warning(cycle_folder):
    """A finite but implausible risk factor (an age of 5,000) is a warning at the data stage, not a
    crash later."""
    from .conftest import small_cohort

    units, cohort = small_cohort()
    cohort = pd.concat([cohort] * 3, ignore_index=True)
    cohort["stay_id"] = [f"s{i}" for i in range(len(cohort))]
    cohort.loc[4, "age"] = 5000
    loaded = load_cohort(load_config(cycle_folder(units=units, cohort=cohort)))
    far = [w for w in loaded.warnings if "column 'age'" in w]
    assert (
        far
        and "1 value(s) lie more than 100 interquartile ranges from the median (such as 5000, "
        "at row 5)"
        in far[0]
    )
