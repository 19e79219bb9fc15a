"""Cycle config: defaults, and every problem reported at once with its key and a hint."""

from __future__ import annotations

from pathlib import Path

import pytest

from pipeline.config import load_config, reference_table
from pipeline.errors import ConfigError

from .conftest import BASE_CONFIG


def test_valid_config_gets_documented_defaults(cycle_folder):
    config = load_config(cycle_folder())
    assert config.reporting.interval == 0.95
    assert config.reporting.minimum_cases == 11
    assert config.reporting.benchmark == "network"
    assert config.inputs.unit_column == "unit_id"
    assert config.cycle.output == (config.source.parent / "site").resolve()
    # defaults resolve beside the config too
    assert config.cycle.cache == config.source.parent / ".fairgauge-cache"
    assert config.cycle.history == config.source.parent / "history"
    assert config.measures[0].better == "lower"
    assert len(config.sha256) == 64


def test_every_problem_is_reported_at_once_with_hints(tmp_path):
    bad = BASE_CONFIG.replace('title = "Test network"\n', "").replace(
        'renderer = "builtin"', 'renderer = "quatro"'
    )
    bad = bad.replace(
        'record_column = "stay_id"',
        'record_column = "stay_id"\n[reporting]\nminimum_case = 5\ninterval = 1.5',
    )
    bad = bad.replace("chains = 2", "chians = 2").replace(
        'casemix = "age + C(sex)"', 'casemix = "age + C(sex)"\ntype = "binari"'
    )
    (tmp_path / "cycle.toml").write_text(bad)
    with pytest.raises(ConfigError) as caught:
        load_config(tmp_path / "cycle.toml")  # no data files exist: the config is checked first
    found = [str(p) for p in caught.value.problems]
    assert found == [
        "cycle.title: is required (Site title shown on every page.)",
        "cycle.renderer: must be one of 'auto', 'quarto', 'builtin'; got 'quatro' Did you mean "
        "'quarto'?",
        "reporting.minimum_case: unknown key. Did you mean 'minimum_cases'? Allowed: "
        "benchmark, funnel_overdispersion, grouping, grouping_probability, hide_counts_below, "
        "interval, minimum_cases.",
        "reporting.interval: must be strictly between 0.5 and 1; got 1.5",
        "sampler.chians: unknown key. Did you mean 'chains'? Allowed: chains, cores, draws, "
        "engine, seed, target_accept, tune.",
        "measures[0].type: 'binari' is not an outcome type fairgauge fits. Allowed: binary, "
        "continuous. Did you mean 'binary'?",
    ]
    assert "6 problem(s) in the cycle config; no data were read" in str(caught.value)


def test_wrong_types_unknown_sections_and_duplicate_measures(tmp_path):
    text = (
        BASE_CONFIG.replace("draws = 300", 'draws = "many"')
        + BASE_CONFIG[BASE_CONFIG.index("[[measures]]") :]
        + "\n[reportng]\n"
    )
    (tmp_path / "cycle.toml").write_text(text)
    with pytest.raises(ConfigError) as caught:
        load_config(tmp_path / "cycle.toml")
    found = [str(p) for p in caught.value.problems]
    assert "sampler.draws: must be a whole number; got str 'many'" in found
    assert (
        "reportng: unknown section. Did you mean 'reporting'? Allowed: cycle, inputs, "
        "measures, reporting, review, sampler, validation." in found
    )
    assert "measures[1].key: 'readmit' is already used by measures[0]; keys must be unique" in found


def test_measure_key_must_be_a_safe_file_name_and_formula_rhs_only(tmp_path):
    text = BASE_CONFIG.replace('key = "readmit"', 'key = "../escape"').replace(
        'casemix = "age + C(sex)"', 'casemix = "readmit ~ age"'
    )
    (tmp_path / "cycle.toml").write_text(text)
    with pytest.raises(ConfigError) as caught:
        load_config(tmp_path / "cycle.toml")
    messages = " | ".join(str(p) for p in caught.value.problems)
    assert "measures[0].key: '../escape' is not allowed" in messages
    assert "measures[0].casemix: give only the right-hand side of the formula (no '~')" in messages


def test_not_toml_and_missing_file(tmp_path):
    (tmp_path / "cycle.toml").write_text("[cycle\ntitle = 1")
    with pytest.raises(ConfigError, match="is not valid TOML"):
        load_config(tmp_path / "cycle.toml")
    with pytest.raises(ConfigError, match="cannot be read"):
        load_config(tmp_path / "absent.toml")


def test_developers_guide_lists_every_config_key():
    guide = (Path(__file__).parents[1] / "DEVELOPERS.md").read_text(encoding="utf-8")
    assert reference_table() in guide, (
        "regenerate the key reference in DEVELOPERS.md with pipeline.config.reference_table()"
    )


def test_the_families_table_names_only_things_that_exist():
    """Every family's likelihood and funnel null are implemented, and every outcome type's default
    family serves that type (families.py is the one table)."""
    from pipeline.families import FAMILIES, OUTCOME_TYPES, default_family
    from pipeline.shrinkage.model import LIKELIHOODS
    from pipeline.website.funnel import NULLS

    for family in FAMILIES.values():
        assert family.likelihood in LIKELIHOODS, family.name
        assert family.funnel_null in NULLS, family.name
    for kind, names in OUTCOME_TYPES.items():
        assert default_family(kind).outcome_type == kind and names[0] == default_family(kind).name
    assert set(OUTCOME_TYPES) == {"binary", "continuous"}
