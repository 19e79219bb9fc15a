"""Case-mix fit: C-statistic, calibration and coefficients, checked against outside references."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.special import expit

from pipeline.casemix.model import c_statistic, calibrate_intercept, fit_casemix
from pipeline.config import MeasureSection
from pipeline.errors import FitError


def _measure(casemix: str) -> MeasureSection:
    return MeasureSection(key="m", name="M", definition="d", outcome="y", casemix=casemix)


def test_c_statistic_reproduces_hanley_mcneil_1982_rating_example():
    # Hanley & McNeil (1982), Radiology 143:29-36, table 1: 58 normal and 51 abnormal scans rated
    # 1-5.
    # Published area 0.893; 0.893171 computed from the published counts (ties count one half).
    ratings = np.arange(1, 6)
    normal = np.repeat(ratings, [33, 6, 6, 11, 2])
    abnormal = np.repeat(ratings, [3, 2, 2, 11, 33])
    y = np.r_[np.zeros(len(normal)), np.ones(len(abnormal))]
    area = c_statistic(y, np.r_[normal, abnormal])
    assert round(area, 3) == 0.893
    assert area == pytest.approx(0.893171, abs=5e-7)


def test_c_statistic_equals_scikit_learn_roc_auc_score_with_ties():
    from sklearn.metrics import roc_auc_score  # reference implementation (scikit-learn)

    rng = np.random.default_rng(3)
    score = rng.integers(0, 20, 2000) / 4.0  # many ties on purpose
    y = rng.random(2000) < expit(score - 2.5)
    assert c_statistic(y, score) == pytest.approx(roc_auc_score(y, score), abs=1e-12)


def test_intercept_calibration_matches_observed_events():
    rng = np.random.default_rng(1)
    linear = rng.normal(0, 1, 5000)
    c = calibrate_intercept(linear, 612.0)
    assert expit(c + linear).sum() == pytest.approx(612.0, abs=1e-6)


def _network(rng, n_units=30, per_unit=400, confounded=True):
    """Units whose patients' risk and whose quality go together (when ``confounded``)."""
    severity = rng.normal(0, 1, n_units)
    quality = 0.5 * severity if confounded else rng.normal(0, 0.5, n_units)
    unit = np.repeat(np.arange(n_units), per_unit)
    x = rng.normal(severity[unit], 1.0)
    male = rng.random(len(unit)) < 0.5
    y = rng.random(len(unit)) < expit(-2.0 + 0.8 * x + 0.3 * male + quality[unit])
    return pd.DataFrame({"x": x, "sex": np.where(male, "M", "F"), "y": y.astype(int)}), unit


def test_coefficients_agree_with_scikit_learn_unpenalised_logistic_regression():
    from sklearn.linear_model import LogisticRegression  # independent fit (scikit-learn, lbfgs)

    rng = np.random.default_rng(11)
    rows, unit = _network(rng, confounded=False)
    fit = fit_casemix(_measure("x + C(sex)"), rows, unit)
    design = np.column_stack(
        [rows["x"], rows["sex"] == "M", (unit[:, None] == np.arange(1, 30)).astype(float)]
    )
    # C=inf: no penalty
    ref = LogisticRegression(C=np.inf, max_iter=5000, tol=1e-10).fit(design, rows["y"])
    ours = fit.coefficients["estimate"]
    assert [ours["x"], ours["C(sex)[T.M]"]] == pytest.approx(ref.coef_[0, :2], abs=2e-4)
    assert fit.expected.sum() == pytest.approx(rows["y"].sum(), rel=1e-9)
    assert fit.units_in_fit == 30


def test_within_unit_coefficients_are_not_fooled_when_sicker_units_are_worse():
    rng = np.random.default_rng(5)
    rows, unit = _network(rng, confounded=True)
    within = fit_casemix(_measure("x + C(sex)"), rows, unit).coefficients.loc["x", "estimate"]
    pooled = fit_casemix(
        _measure("x + C(sex)"), rows, np.zeros(len(rows), dtype=int)
    ).coefficients.loc["x", "estimate"]
    assert abs(within - 0.8) < 0.05  # true value 0.8
    # one pooled fit credits part of the units' quality to the risk factor
    assert pooled - 0.8 > 0.1


def test_units_without_outcome_variation_are_left_out_of_the_coefficient_fit_only():
    rng = np.random.default_rng(2)
    rows, unit = _network(rng, n_units=6, per_unit=300, confounded=False)
    rows.loc[unit == 5, "y"] = 0  # a unit with no events at all
    fit = fit_casemix(_measure("x"), rows, unit)
    assert fit.units_in_fit == 5
    assert len(fit.expected) == len(rows) and np.all(fit.expected[unit == 5] > 0)


def test_no_events_and_unbuildable_formula_are_explained():
    rows = pd.DataFrame({"y": [0, 0, 0], "x": [1.0, 2.0, 3.0]})
    with pytest.raises(FitError, match="no patient had the outcome 'y'"):
        fit_casemix(_measure("x"), rows, np.zeros(3, dtype=int))
    rows["y"] = [0, 1, 0]
    with pytest.raises(
        FitError, match="the case-mix formula 'nosuchfunction\\(x\\)' cannot be built"
    ):
        fit_casemix(_measure("nosuchfunction(x)"), rows, np.zeros(3, dtype=int))


def test_block_newton_solver_gives_statsmodels_estimates_for_many_units(monkeypatch):
    """The large-network path must agree with statsmodels' dummy-column fit (the reference)."""
    rng = np.random.default_rng(8)
    rows, unit = _network(rng, n_units=60, per_unit=80, confounded=True)
    dense = fit_casemix(_measure("x + C(sex)"), rows, unit)
    monkeypatch.setattr("pipeline.casemix.solver.DENSE_LIMIT", 0)
    blocked = fit_casemix(_measure("x + C(sex)"), rows, unit)
    assert (dense.solver, blocked.solver) == ("statsmodels", "block-newton")
    assert blocked.units_in_fit == dense.units_in_fit
    assert blocked.coefficients["estimate"].to_numpy() == pytest.approx(
        dense.coefficients["estimate"].to_numpy(), abs=1e-7
    )
    assert blocked.coefficients["std_error"].to_numpy() == pytest.approx(
        dense.coefficients["std_error"].to_numpy(), rel=1e-5
    )
    monkeypatch.setattr("pipeline.casemix.solver.DENSE_LIMIT", 0)
    no_terms = fit_casemix(_measure("1"), rows, unit)
    assert len(no_terms.coefficients) == 0 and no_terms.expected.sum() == pytest.approx(
        rows["y"].sum()
    )


def _stays(rng, n_units=12, per_unit=150):
    unit = np.repeat(np.arange(n_units), per_unit)
    x = rng.normal(size=len(unit))
    mean = np.exp(1.5 + 0.3 * x + rng.normal(0, 0.2, n_units)[unit])
    return pd.DataFrame({"x": x, "los": rng.gamma(2.0, mean / 2.0)}), unit


def _continuous(family: str, casemix: str = "x") -> MeasureSection:
    return MeasureSection(
        key="los",
        name="Stay",
        definition="d",
        outcome="los",
        type="continuous",
        family=family,
        unit_label="days",
        casemix=casemix,
    )


def test_gamma_within_unit_fit_matches_statsmodels_gamma_glm_with_unit_dummies():
    # reference: statsmodels GLM, Gamma family, log link, Pearson scale
    import statsmodels.api as sm

    rng = np.random.default_rng(12)
    rows, unit = _stays(rng)
    fit = fit_casemix(_continuous("gamma"), rows, unit)
    exog = np.column_stack(
        [np.ones(len(rows)), rows["x"], (unit[:, None] == np.arange(1, 12)).astype(float)]
    )
    ref = sm.GLM(rows["los"], exog, family=sm.families.Gamma(sm.families.links.Log())).fit()
    assert fit.coefficients.loc["x", "estimate"] == pytest.approx(ref.params.iloc[1], abs=1e-7)
    assert fit.coefficients.loc["x", "std_error"] == pytest.approx(ref.bse.iloc[1], rel=1e-4)
    # calibration-in-the-large
    assert fit.expected.sum() == pytest.approx(rows["los"].sum(), rel=1e-9)


def test_lognormal_fit_matches_least_squares_with_unit_dummies_and_duan_smearing():
    import statsmodels.api as sm  # reference: statsmodels OLS

    rng = np.random.default_rng(13)
    rows, unit = _stays(rng)
    fit = fit_casemix(_continuous("lognormal"), rows, unit)
    exog = np.column_stack(
        [np.ones(len(rows)), rows["x"], (unit[:, None] == np.arange(1, 12)).astype(float)]
    )
    ref = sm.OLS(np.log(rows["los"]), exog).fit()
    assert fit.coefficients.loc["x", "estimate"] == pytest.approx(ref.params.iloc[1], abs=1e-9)
    assert fit.coefficients.loc["x", "std_error"] == pytest.approx(ref.bse.iloc[1], rel=1e-9)
    # Duan (1983): smearing factor = mean of exp(residual) around the network intercept.
    resid = np.log(rows["los"]) - fit.intercept - fit.linear
    assert fit.smearing == pytest.approx(np.mean(np.exp(resid)))
    assert fit.smearing > 1.0
    assert fit.expected == pytest.approx(np.exp(fit.intercept + fit.linear) * fit.smearing)


def test_missing_values_follow_the_policy_and_are_counted():
    rng = np.random.default_rng(3)
    rows, unit = _network(rng, n_units=4, per_unit=200, confounded=False)
    rows.loc[[3, 10, 450], "x"] = np.nan
    rows.loc[[10, 700], "sex"] = None
    dropped = fit_casemix(
        MeasureSection(
            key="m", name="M", definition="d", outcome="y", casemix="x + C(sex)", missing="drop"
        ),
        rows,
        unit,
    )
    assert dropped.patients == 800 - 4 and dropped.used.sum() == 796
    assert (
        dropped.exclusions["dropped"] == {"x": 3, "sex": 2}
        and dropped.exclusions["dropped_rows"] == 4
    )
    assert dropped.exclusions["by_unit"] == {0: 2, 2: 1, 3: 1}
    imputed = fit_casemix(
        MeasureSection(
            key="m", name="M", definition="d", outcome="y", casemix="x + C(sex)", missing="impute"
        ),
        rows,
        unit,
    )
    assert (
        imputed.patients == 800
        and imputed.exclusions["imputed"] == {"x": 3, "sex": 2}
        and imputed.exclusions["imputed_rows"] == 4
    )


def test_design_problems_are_explained_in_words():
    rng = np.random.default_rng(6)
    rows, unit = _network(rng, n_units=3, per_unit=200, confounded=False)
    rows["rare"] = 0
    rows.loc[:4, "rare"] = 1
    rows.loc[:4, "y"] = 0  # nobody with the rare condition had the outcome
    with pytest.raises(
        FitError, match=r"none of the 5 patients with 'rare' had the outcome \(perfect separation\)"
    ):
        fit_casemix(_measure("x + rare"), rows, unit)
    rows["x_again"] = 2 * rows["x"] + 1
    with pytest.raises(FitError, match=r"the terms 'x', 'x_again' carry the same information"):
        fit_casemix(_measure("x + x_again"), rows, unit)
    rows["band"] = pd.Categorical(
        np.where(rows["x"] > 0, "high", "low"), categories=["high", "low", "none"]
    )
    with pytest.raises(
        FitError, match=r"'C\(band\)\[T.none\]' has no patients \(an empty category\)"
    ):
        fit_casemix(_measure("C(band)"), rows, unit)
    rows["flat"] = 7.0
    with pytest.raises(FitError, match=r"'flat' is the same for every patient"):
        fit_casemix(_measure("x + flat"), rows, unit)
    rows["x_close"] = rows["x"] + rng.normal(0, 0.1, len(rows))
    fit = fit_casemix(_measure("x + x_close"), rows, unit)
    assert len(fit.warnings) == 1 and "are almost the same (correlation 0.99" in fit.warnings[0]


def test_formula_terms_splines_interactions_and_supplied_risk():
    from pipeline.formulas import without_terms

    rng = np.random.default_rng(7)
    rows, unit = _network(rng, n_units=5, per_unit=300, confounded=False)
    rows["z"] = rng.normal(size=len(rows))
    fit = fit_casemix(_measure("bs(x, df=4) + C(sex) * z"), rows, unit)
    assert list(fit.coefficients.index) == [
        "C(sex)[T.M]",
        *[f"bs(x, df=4)[{i}]" for i in range(4)],
        "z",
        "C(sex)[T.M]:z",
    ]
    # a spline basis already holds the straight line
    with pytest.raises(FitError, match="carry the same information"):
        fit_casemix(_measure("bs(x, df=4) + x:C(sex)"), rows, unit)
    assert without_terms("C(age) + x * dep + bs(z, df=3)", ("dep",)) == "C(age) + x + bs(z, df=3)"
    rows["risk"] = expit(-2 + 0.8 * rows["x"])
    supplied = fit_casemix(
        MeasureSection(key="m", name="M", definition="d", outcome="y", expected_column="risk"),
        rows,
        unit,
    )
    assert supplied.family == "supplied" and supplied.expected == pytest.approx(
        rows["risk"].to_numpy()
    )
    as_covariate = fit_casemix(_measure("logit(risk)"), rows, unit)
    assert as_covariate.coefficients.loc["logit(risk)", "estimate"] == pytest.approx(1.0, abs=0.15)
