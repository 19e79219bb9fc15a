"""Outside checks for the public site's building blocks: reading level, colour contrast, funnel
limits.

Each check names its source. Values marked [computed] were worked out from the published formula
with numpy/scipy; [published] are printed in the source.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from pipeline.website import colours, funnel, readability

# --- Reading level -----------------------------------------------------------------------------


def test_flesch_kincaid_on_fixed_counts():
    # Kincaid, Fishburne, Rogers & Chissom (1975), grade formula; Flesch (1948), reading ease.
    # 100 words, 5 sentences, 150 syllables -> grade 9.91, ease 59.635 [computed from the formulas].
    assert readability.grade(100, 5, 150) == pytest.approx(9.91, abs=1e-9)
    assert readability.ease(100, 5, 150) == pytest.approx(59.635, abs=1e-9)


@pytest.mark.parametrize(
    "word, n",
    # Dictionary syllable counts (any English dictionary; common practice, no source for the rule).
    [
        ("rate", 1),
        ("rates", 1),
        ("cases", 2),
        ("patient", 2),
        ("adjusted", 3),
        ("pulled", 1),
        ("hospital", 3),
        ("interval", 3),
        ("credible", 3),
        ("variation", 4),
        ("period", 3),
        ("table", 2),
        ("benchmark", 2),
        ("readmitted", 4),
    ],
)
def test_syllables_of_common_words(word, n):
    assert readability.syllables(word) == n


def test_numbers_are_read_aloud():
    assert readability.spoken_number("14.2%") == ["fourteen", "point", "two", "percent"]
    assert readability.spoken_number("1,234") == [
        "one",
        "thousand",
        "two",
        "hundred",
        "thirty",
        "four",
    ]
    c = readability.count(["About 14 in every 100 patients."])
    assert (c.words, c.sentences) == (7, 1)  # about fourteen in every one hundred patients


def test_prose_leaves_out_tables_code_and_the_technical_appendix():
    html = (
        "<html><body><nav><p>Site menu text.</p></nav><main><h1>Title here</h1><p>One short "
        "line. Two more words!</p>"
        "<table><tr><td>Cell text that is long.</td></tr></table><ul><li>A list item</li></ul>"
        '<div class="fg-appendix"><p>Heteroscedasticity notwithstanding.</p></div><p>Last '
        "<code>x ~ y</code> line.</p></main></body></html>"
    )
    assert readability.prose(html) == [
        "Title here",
        "One short line. Two more words!",
        "A list item",
        "Last line.",
    ]
    assert readability.page_level(html).sentences == 5


def test_grade_agrees_with_textstat_on_plain_prose():
    # textstat (PyPI), a general-purpose implementation of the same formula with a dictionary-based
    # syllable counter; on prose without numbers the two should agree to about one grade.
    textstat = pytest.importorskip("textstat")
    text = (
        "These figures are estimates, not verdicts. They allow for the risks we can see in the "
        "records. "
        "A small unit can have a high rate by bad luck alone. So we pull small units towards "
        "the network average. "
        "Talk to a clinician you trust before you choose where to get care. Local rules on "
        "public reporting apply."
    )
    ours = readability.count([text]).grade
    assert abs(ours - textstat.flesch_kincaid_grade(text)) < 1.0


# --- Colour contrast ---------------------------------------------------------------------------


def test_wcag_contrast_worked_values():
    # WCAG 2.1 relative luminance and contrast ratio (W3C). [computed] #767676 on white 4.5422
    # passes
    # AA for text; #777777 on white 4.4781 fails.
    assert colours.ratio("#767676", "#ffffff") == pytest.approx(4.5422, abs=5e-4)
    assert colours.ratio("#777777", "#ffffff") == pytest.approx(4.4781, abs=5e-4)
    assert (
        colours.ratio("#767676", "#ffffff")
        >= colours.TEXT_MIN
        > colours.ratio("#777777", "#ffffff")
    )
    assert colours.ratio("#000", "#fff") == pytest.approx(21.0)


# --- Funnel limits -----------------------------------------------------------------------------


@pytest.mark.parametrize(
    "theta0, n, p, limit",
    # Spiegelhalter (2005), Statistics in Medicine 24:1185, appendix A.1.1 (interpolated exact
    # binomial limits) [computed from the published formula with scipy].
    [
        (0.10, 100, 0.001, 0.014179),
        (0.10, 100, 0.025, 0.040381),
        (0.10, 100, 0.975, 0.157719),
        (0.10, 100, 0.999, 0.198357),
        (0.05, 200, 0.025, 0.019584),
        (0.05, 200, 0.975, 0.079708),
        (0.20, 50, 0.025, 0.084405),
        (0.20, 50, 0.975, 0.307094),
    ],
)
def test_exact_binomial_limits(theta0, n, p, limit):
    assert funnel.binomial_limit(theta0, n, p) == pytest.approx(limit, abs=5e-7)


def test_binomial_limits_approach_the_normal_ones_for_big_units():
    # Large-sample agreement with theta0 +- z sqrt(theta0 (1 - theta0) / n) (Spiegelhalter 2005,
    # section 3).
    n = 200_000
    for p in (0.001, 0.025, 0.975, 0.999):
        normal = 0.1 + stats.norm.ppf(p) * np.sqrt(0.1 * 0.9 / n)
        assert funnel.binomial_limit(0.1, n, p) == pytest.approx(normal, abs=2e-5)


def test_poisson_limits_for_oe_ratios():
    # The same interpolation with R ~ Poisson(E), limit (r_p - alpha) / E [method from memory,
    # values computed].
    e, p = 20.0, 0.975
    r = stats.poisson.ppf(p, e)
    alpha = (stats.poisson.cdf(r, e) - p) / (stats.poisson.cdf(r, e) - stats.poisson.cdf(r - 1, e))
    assert funnel.poisson_limit(e, p) == pytest.approx((r - alpha) / e)
    assert 1.3 < funnel.poisson_limit(e, p) < 1.5 and 0.5 < funnel.poisson_limit(e, 0.025) < 0.7


def test_overdispersion_by_the_published_recipe():
    # Spiegelhalter (2005), Quality and Safety in Health Care 14:347: winsorise z at the 10th/90th
    # percentiles, phi = mean z^2, tau^2 = max(0, (I phi - (I - 1)) / (sum w - sum w^2 / sum w)).
    rng = np.random.default_rng(4)
    n = rng.integers(50, 800, 60).astype(float)
    theta = np.clip(0.1 + rng.normal(0, 0.03, 60), 0.01, 0.5)
    y = rng.binomial(n.astype(int), theta) / n
    s = np.sqrt(0.1 * 0.9 / n)
    z = (y - 0.1) / s
    lo, hi = np.percentile(z, [10, 90])
    phi = np.mean(np.clip(z, lo, hi) ** 2)
    w = 1 / s**2
    tau2 = (60 * phi - 59) / (w.sum() - (w**2).sum() / w.sum())
    assert funnel.overdispersion(y, 0.1, s) == pytest.approx((phi, tau2))
    assert phi > 1.5 and tau2 > 0  # the invented units really differ
    # Without true differences, phi is near 1 and tau^2 is usually 0.
    y0 = rng.binomial(n.astype(int), 0.1) / n
    assert funnel.overdispersion(y0, 0.1, s)[0] < 1.5


def test_funnel_points_and_widening():
    # Every patient at 10% risk: V = 0.09 n, so a unit's limits are the binomial(n, 0.1) ones above.
    t = pd.DataFrame(
        {
            "unit_name": list("ABCDEF"),
            "group": ["typical"] * 6,
            "status": ["reported"] * 5 + ["too_few"],
            "cases": [100, 200, 400, 800, 50, 5],
            "observed": [10, 30, 30, 120, 2, 1],
            "expected": [10, 20, 40, 80, 5, 0.5],
        }
    )
    t["variance"] = t["expected"] * 0.9
    f = funnel.funnel(t, "binomial", benchmark=0.1)
    assert len(f.points) == 5  # the unit with too few cases is not shown
    np.testing.assert_allclose(f.points["value"], [0.1, 0.15, 0.075, 0.15, 0.04])
    np.testing.assert_allclose(f.points["precision"], t["expected"][:5] / 0.9)
    # 100 cases at 10%, as above
    assert f.points.loc[0, "upper_95"] == pytest.approx(0.157719, abs=5e-7)
    assert f.points.loc[0, "lower_998"] == pytest.approx(0.014179, abs=5e-7)
    # 50 cases at 10%: P(0 events) = 0.005 > 0.001, so the interpolation would go below 0; it stops
    # at 0.
    assert (
        f.points.loc[4, "lower_998"] == 0.0
        and (f.points[list(funnel.LIMIT_COLUMNS)] >= 0).all().all()
    )
    counts = funnel.outside(f)
    assert counts["units"] == 5 and counts["998"] <= counts["95"]
    wide = funnel.funnel(t, "binomial", benchmark=0.1, widen=True)
    assert wide.tau2 > 0 and (wide.points["upper_998"] > f.points["upper_998"] - 1e-3).all()
    assert funnel.outside(wide)["95"] <= counts["95"]


def test_funnel_limits_follow_expected_events_not_cases():
    # Two units of 400 patients: one of low-risk patients (E = 8), one of high-risk patients (E =
    # 80).
    # The low-risk unit's O/E is far less precise, so its limits must be wider (the defect fixed:
    # limits drawn from binomial(cases, network rate) gave both units the same limits).
    t = pd.DataFrame(
        {
            "unit_name": list("ABC"),
            "group": ["typical"] * 3,
            "status": ["reported"] * 3,
            "cases": [400, 400, 400],
            "observed": [8, 80, 40],
            "expected": [8.0, 80.0, 40.0],
        }
    )
    t["variance"] = [8 * 0.98, 80 * 0.8, 40 * 0.9]
    f = funnel.funnel(t, "binomial", benchmark=0.1)
    low, high = f.points.iloc[0], f.points.iloc[1]
    assert low["upper_95"] - low["lower_95"] > 2.5 * (high["upper_95"] - high["lower_95"])
    # Unit-level counts: Poisson limits at each unit's E, exactly the Poisson limits above.
    p = funnel.funnel(t.drop(columns="variance"), "poisson", benchmark=0.1)
    np.testing.assert_allclose(
        p.points["upper_95"], funnel.poisson_limit(t["expected"], 0.975) * 0.1
    )
    np.testing.assert_allclose(p.points["precision"], t["expected"])
    with pytest.raises(ValueError, match="allowed: poisson, binomial, gamma"):
        funnel.funnel(t, "binary", benchmark=0.1)
