"""The command line: errors printed once, with exit codes; nothing fitted on a bad config."""

from __future__ import annotations

from pipeline.cli import main

from .conftest import BASE_CONFIG


def test_config_problems_exit_2_before_any_data_are_read(tmp_path, capsys):
    (tmp_path / "cycle.toml").write_text(BASE_CONFIG.replace("chains = 2", "chains = 1"))
    assert main(["build", str(tmp_path / "cycle.toml")]) == 2  # cohort.csv does not even exist
    err = capsys.readouterr().err
    assert err.startswith("fairgauge: ERROR 1 problem(s) in the cycle config; no data were read:\n")
    assert "  - sampler.chains: must be from 2 to 16; got 1" in err


def test_input_problems_exit_2(cycle_folder, capsys):
    from .conftest import small_cohort

    units, cohort = small_cohort()
    cohort.loc[0, "readmit"] = 5
    assert main(["build", str(cycle_folder(cohort=cohort))]) == 2
    assert (
        "column 'readmit': must be 0 or 1 for a binary measure; found 5 at row 1."
        in capsys.readouterr().err
    )


def test_strict_stops_on_warnings(cycle_folder, capsys):
    import pandas as pd

    from .conftest import small_cohort

    units, cohort = small_cohort()
    units = pd.concat([units, pd.DataFrame({"id": ["z9"], "name": ["Spare"], "kind": ["clinic"]})])
    assert main(["build", "--strict", str(cycle_folder(units=units))]) == 5
    captured = capsys.readouterr()
    assert "WARNING 1 unit(s)" in captured.out
    assert "1 warning(s) and --strict is set; nothing was fitted or published." in captured.err


def test_check_lists_problems_or_passes_without_fitting(cycle_folder, capsys):
    from .conftest import small_cohort

    assert main(["check", str(cycle_folder())]) == 0
    assert (
        "fairgauge: check passed: 6 patient rows, 2 units with cases, 2 in the unit table; 0 "
        "warning(s). Nothing was fitted." in capsys.readouterr().out
    )
    units, cohort = small_cohort()
    cohort.loc[1, "unit_id"] = "zz"
    cohort.loc[2, "readmit"] = 7
    assert main(["check", str(cycle_folder(cohort=cohort))]) == 2
    err = capsys.readouterr().err
    assert "2 problem(s) in the input data; nothing was fitted:" in err
    assert (
        "column 'unit_id': has unit ids not in the unit table" in err and "found 7 at row 3." in err
    )
