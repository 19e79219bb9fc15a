"""Unit-level predictors of what small units are pulled towards (targets.py): the design, its
checks, the fit."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipeline.inputs import targets


def _units(n=40, seed=0):
    rng = np.random.default_rng(seed)
    ids = [f"u{i:02d}" for i in range(n)]
    kinds = pd.Series(
        rng.choice(["hospital", "clinic", "clinic", "surgical centre"], n),
        index=ids,
        dtype="string",
    )
    attributes = pd.DataFrame(
        {
            "beds": rng.integers(10, 500, n).astype(float),
            "region": rng.choice(["north", "south"], n),
        },
        index=ids,
    )
    cases = pd.Series(rng.integers(20, 2000, n), index=ids)
    return ids, kinds, attributes, cases


def test_design_is_centred_and_scaled_over_units_with_data():
    ids, kinds, attributes, cases = _units()
    present = np.ones(len(ids), bool)
    present[:3] = False  # three units without data this cycle
    risk = np.linspace(-2, -1, len(ids))
    d = targets.design(
        ("log_cases", "case_mix", "kind", "beds"),
        ids,
        present,
        cases.to_numpy(float),
        risk,
        kinds,
        attributes,
    )
    assert d.columns[:2] == ("log_cases", "case_mix") and d.columns[-1] == "beds"
    kind_terms = [c for c in d.columns if c.startswith("kind: ")]
    most_common = kinds[present].value_counts().idxmax()
    # the most common kind is the reference
    assert len(kind_terms) == kinds.nunique() - 1 and f"kind: {most_common}" not in kind_terms
    np.testing.assert_allclose(d.w[present].mean(axis=0), 0, atol=1e-12)
    np.testing.assert_allclose(d.w[present].std(axis=0), 1, atol=1e-12)
    assert (d.w[~present] == 0).all()
    assert d.centre[0] == pytest.approx(np.log(cases.to_numpy(float)[present]).mean())
    assert d.spread[-1] == pytest.approx(attributes["beds"].to_numpy()[present].std())


@pytest.mark.parametrize(
    "names, expected",
    [
        (
            ("beds", "floors"),
            "'floors' is neither a built-in predictor nor a column of the units table; "
            "allowed: log_cases, case_mix, kind, beds, region",
        ),
        (("region",), "units table column 'region' must hold numbers; found '"),
        (("log_cases", "log_cases"), "'log_cases' is listed twice"),
    ],
)
def test_unknown_or_unusable_predictors_are_named(names, expected):
    ids, kinds, attributes, cases = _units()
    problems = targets.check(names, "readmit", attributes, kinds, pd.Index(ids), True, True, cases)
    assert any(expected in p for p in problems), problems
    assert all(p.endswith("(measure 'readmit').") for p in problems)


def test_missing_constant_and_too_many_predictors_are_named():
    ids, kinds, attributes, cases = _units()
    attributes.loc[["u03", "u07"], "beds"] = np.nan
    attributes["teaching"] = 1.0
    problems = " ".join(
        targets.check(
            ("beds", "teaching"), "m", attributes, kinds, pd.Index(ids), True, True, cases
        )
    )
    assert (
        "'beds' is empty for unit(s) u03, u07" in problems
        and "'teaching' is the same for every unit" in problems
    )
    few = pd.Index(ids[:15])  # 15 units cannot carry 2 terms at 10 units per term
    problems = " ".join(
        targets.check(("log_cases", "case_mix"), "m", attributes, kinds, few, True, True, cases)
    )
    assert (
        "2 predictor term(s) need at least 20 units with data (10 per term); this measure has 15"
        in problems
    )
    problems = " ".join(
        targets.check(("case_mix",), "m", attributes, kinds, pd.Index(ids), False, False, cases)
    )
    assert "'case_mix' needs patient rows" in problems
    problems = " ".join(
        targets.check(("case_mix",), "m", attributes, kinds, pd.Index(ids), True, False, cases)
    )
    assert 'casemix is "1"' in problems
    same = pd.Series(100, index=ids)
    assert "every unit has the same number of cases" in " ".join(
        targets.check(("log_cases",), "m", attributes, kinds, pd.Index(ids), True, True, same)
    )


def test_a_bad_predictor_stops_the_cycle_before_any_fit(cycle_folder, capsys, monkeypatch):
    from pipeline.cli import main

    from .conftest import BASE_CONFIG

    def no_fit(*a, **k):
        raise AssertionError("nothing may be fitted")

    monkeypatch.setattr("pipeline.fit_steps.fit_with_design", no_fit)
    config = BASE_CONFIG.replace(
        'casemix = "age + C(sex)"',
        'casemix = "age + C(sex)"\npull_towards = ["log_cases", "beds"]',
        1,
    )
    assert config != BASE_CONFIG
    assert main(["build", str(cycle_folder(config=config))]) == 2
    err = capsys.readouterr().err
    assert (
        "pull_towards" in err
        and "'beds' is neither a built-in predictor nor a column of the units table" in err
    )


@pytest.mark.slow
def test_predictor_coefficient_and_unit_effects_agree_with_lme4():
    """Against R's lme4 (Bates et al. 2015, J Stat Softw 67:1; Debian's r-cran-lme4):
    glmer(y ~ x + log_cases + (1 | unit), binomial) on an invented 40-unit network where small
    units are worse (tests/reference_data: make_volume_network.py writes the data, lme4_volume.R
    the fit). fairgauge fits x within units (casemix.py), then the shrinkage fit with
    pull_towards = ["log_cases"]; a posterior median and a maximum-likelihood estimate agree
    to well within one standard error with this much data (tolerances below, our choice)."""
    from pathlib import Path

    from pipeline.casemix.benchmark import benchmark_offset
    from pipeline.casemix.model import fit_with_design
    from pipeline.config import MeasureSection, SamplerSection
    from pipeline.shrinkage.model import Cells, ShrinkageSpec
    from pipeline.shrinkage.sampling import Sampler

    folder = Path(__file__).parent / "reference_data"
    cells = pd.read_csv(folder / "volume_network.csv")
    lme4 = pd.read_csv(folder / "lme4_volume.csv").set_index("name")
    rows = cells.loc[cells.index.repeat(cells["cases"])].reset_index(drop=True)
    rank = rows.groupby(["unit", "x"]).cumcount()
    rows["y"] = (rank < rows["events"]).astype(float)
    unit = rows["unit"].to_numpy(np.int64)
    n_units = int(unit.max()) + 1
    measure = MeasureSection(key="v", name="V", definition="d", outcome="y", casemix="x")
    casemix, _, y = fit_with_design(measure, rows, unit)
    offset, _, _ = benchmark_offset("network", measure, casemix, y, unit)
    ids = [str(i) for i in range(n_units)]
    log_cases = cells.groupby("unit")["log_cases"].first().to_numpy()
    d = targets.design(
        ("log_cases",),
        ids,
        np.ones(n_units, bool),
        np.exp(log_cases),
        None,
        pd.Series("u", index=ids),
        pd.DataFrame(index=ids),
    )
    model_cells = Cells.from_patients(unit, offset, y, n_units).with_predictors(d.w)
    draws, diagnostics = Sampler(
        ShrinkageSpec(predictors=1),
        SamplerSection(chains=4, draws=2000, tune=1000, cores=2, seed=1),
    ).run(model_cells, seed=1)
    assert diagnostics.failures() == []

    slope = np.median(draws["beta"][:, 0]) / d.spread[0]  # per unit of log cases
    se = lme4.loc["log_cases", "se"]
    assert abs(slope - lme4.loc["log_cases", "value"]) < 0.35 * se, (
        slope,
        lme4.loc["log_cases"].tolist(),
    )
    assert (
        abs(casemix.coefficients["estimate"].iloc[0] - lme4.loc["x", "value"])
        < 0.5 * lme4.loc["x", "se"]
    )
    assert np.median(draws["tau"]) == pytest.approx(lme4.loc["tau", "value"], abs=0.08)
    # each unit's intercept relative to the calibrated one
    ours = np.median(draws["mu"][:, None] + draws["u"], axis=0)
    theirs = lme4.loc[[f"unit_{i}" for i in range(n_units)], "value"].to_numpy()
    difference = (ours - ours.mean()) - (theirs - theirs.mean())
    assert np.abs(difference).max() < 0.06 and np.corrcoef(ours, theirs)[0, 1] > 0.995, np.abs(
        difference
    ).max()


def test_pages_name_the_predictors_and_the_units_whose_group_depends_on_them():
    from types import SimpleNamespace

    from pipeline.website import markup, sentences, views

    changed = pd.DataFrame(
        {
            "unit_id": ["u1"],
            "unit_name": ["Unit *One*"],
            "group_with": ["worse"],
            "group_without": ["typical"],
            "rsr_with": [0.2],
            "rsr_without": [0.15],
        }
    )
    terms = [
        {
            "term": "log_cases",
            "mean": 5.0,
            "sd": 1.2,
            "effect_median": 0.8,
            "effect_lower": 0.7,
            "effect_upper": 0.9,
        },
        {
            "term": "kind: clinic",
            "mean": 0.3,
            "sd": 0.46,
            "effect_median": 1.1,
            "effect_lower": 0.9,
            "effect_upper": 1.3,
        },
        {
            "term": "kind: surgical centre",
            "mean": 0.2,
            "sd": 0.4,
            "effect_median": 1.0,
            "effect_lower": 0.8,
            "effect_upper": 1.2,
        },
    ]
    groups = {
        "better": {"with": 3, "without": 3},
        "typical": {"with": 30, "without": 31},
        "worse": {"with": 4, "without": 3},
    }
    m = SimpleNamespace(
        targets={"terms": terms, "groups": groups, "changed": changed, "tau_without": 0.3}
    )
    view = views.targets_view(m)
    assert view["words"] == "size and kind" and view["count"] == 1
    assert (
        view["terms"][0]["effect"] == "0.80 (0.70 to 0.90)" and view["groups"]["worse"] == "4 / 3"
    )
    assert view["changed"] == [
        {
            "name": markup.markdown_literal("Unit *One*"),
            "with": "stands out as worse",
            "without": "in line with the benchmark",
        }
    ]
    sentence = sentences.target_sentence(m, pd.Series({"unit_id": "u1"}))
    assert (
        "if every unit were pulled towards one typical unit, it would be in line with the "
        "benchmark." in sentence
    )
    assert sentences.target_sentence(m, pd.Series({"unit_id": "u2"})) == ""
    assert (
        sentences.target_sentence(SimpleNamespace(targets=None), pd.Series({"unit_id": "u1"})) == ""
    )
