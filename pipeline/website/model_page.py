"""The model report: one page per measure for analysts, showing how good its case-mix model is.

Numbers are formatted here (templates only lay them out): coefficients as odds ratios or
ratios of means with 95% intervals, the validation table in-sample and cross-validated, the
calibration table by risk group, exclusions, and sentences that say what the numbers mean.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.config import family_for
from pipeline.results import FIT_SETTINGS, POSITION, MeasureResult, Validation
from pipeline.website import captions
from pipeline.website.captions import FigureView
from pipeline.website.figure_data import model_figure_path
from pipeline.website.markup import code_span, markdown_literal

BINARY_ROWS = [
    "c_statistic",
    "calibration_large",
    "calibration_slope",
    "brier",
    "hl_statistic",
    "hl_p",
    "sensitivity",
    "specificity",
    "ppv",
]
CONTINUOUS_ROWS = ["r_squared", "mae", "mae_percent"]


@dataclass(frozen=True)
class ModelView:
    key: str
    name: str
    measure_href: str
    source: str  # fitted, supplied, unit summary
    family: str
    ratio_word: str
    formula: str
    patients: str
    units_in_fit: int
    solver: str
    extra: list[str]  # sentences about smearing or dispersion
    exclusions: list[str]
    coefficients: list[dict[str, str]]
    validation: list[dict[str, str]]
    folds: int
    groups: list[dict[str, str]]
    quality: list[str]  # how good the case-mix model is, in plain sentences
    roc: FigureView | None
    calibration: FigureView | None
    equity: list[dict[str, str]]
    equity_summary: str
    social_risk: str


def _fmt(key: str, x: float, unit: str) -> str:
    if x is None or (isinstance(x, float) and np.isnan(x)):
        return "not defined"
    if key in ("hl_df",):
        return f"{x:.0f}"
    if key in ("sensitivity", "specificity", "ppv", "mae_percent"):
        return f"{x * 100:.1f}%" if key != "mae_percent" else f"{x:.1f}%"
    if key == "mae":
        return f"{x:.2f} {unit}"
    if key == "hl_p":
        return "less than 0.001" if x < 0.001 else f"{x:.3f}"
    if key == "brier":
        return f"{x:.4f}"
    return f"{x:.3f}"


def _in_ten(c: float) -> str:
    return f"about {c * 10:.0f} times in 10"


def _model_quality(m: MeasureResult) -> list[str]:
    """How good the case-mix model is, in plain sentences."""
    v = m.validation
    if v is None:
        return [
            "The expected events for this measure were supplied per unit by the organisation, "
            "so fairgauge fitted no case-mix "
            "model and cannot check one. How good the adjustment is depends on the model that "
            "produced those numbers."
        ]
    return _binary_summary(v) if v.binary else [_continuous_summary(v)]


def _binary_summary(v: Validation) -> list[str]:
    cv = v.cross_validated
    c_in = v.in_sample.values["c_statistic"]
    text = (
        f"The model ranks a patient who had the outcome above one who did not {_in_ten(c_in)} "
        f"(C-statistic {c_in:.3f}; 0.5 would be a coin toss"
    )
    if cv is not None:
        c_cv = cv.values["c_statistic"]
        text += f", and {c_cv:.3f} on patients the model was not fitted to"
    out = [text + ")."]
    if cv is not None:
        out.append(_slope_words(cv.values["calibration_slope"]))
    groups = v.in_sample.groups
    worst = (
        float(
            np.nanmax(
                np.abs(groups["expected"] / groups["observed"].where(groups["observed"] > 0) - 1)
            )
        )
        if len(groups)
        else float("nan")
    )
    if not np.isnan(worst):
        out.append(
            f"Across the {len(groups)} risk groups, expected and observed counts differ by "
            f"at most {worst * 100:.0f}%."
        )
    return out


def _slope_words(slope: float) -> str:
    """The cross-validated calibration slope in words (1 is ideal)."""
    text = f"Checked on patients it was not fitted to, the calibration slope is {slope:.2f}"
    if slope < 0.9:
        return (
            text + ": the model's risks are too spread out, a sign of overfitting. Consider "
            "fewer risk factors."
        )
    if slope > 1.1:
        return text + ": the model's risks are too bunched together."
    return text + ", close to the ideal of 1: there is no sign of overfitting."


def _continuous_summary(v: Validation) -> str:
    cv = v.cross_validated
    r2, mae = v.in_sample.values["r_squared"], v.in_sample.values["mae_percent"]
    text = (
        f"The model explains {max(r2, 0) * 100:.0f}% of the variation between "
        f"patients; its predictions are off by {mae:.0f}% of the average, on average"
    )
    if cv is not None:
        text += (
            f" ({max(cv.values['r_squared'], 0) * 100:.0f}% and "
            f"{cv.values['mae_percent']:.0f}% on patients it was not fitted to)"
        )
    return (
        text + ". Individual stays vary a lot; the model is meant to make unit averages "
        "comparable, not to predict one patient."
    )


def _losses(m: MeasureResult) -> str:
    """Units that lost patients to missing risk factors, largest loss first (names from the results
    table)."""
    names = m.table.set_index("unit_id")["unit_name"]
    by_unit = sorted(
        (m.casemix.exclusions or {}).get("by_unit", {}).items(), key=lambda kv: (-kv[1], kv[0])
    )
    return "; ".join(f"{markdown_literal(names.get(u, u))} {n:,}" for u, n in by_unit)


def model_view(m: MeasureResult, drawn: dict) -> ModelView:
    """Everything the model report of one measure shows, formatted."""
    fit, v = m.casemix, m.validation
    continuous = not family_for(m.measure).counts_events
    unit = markdown_literal(m.measure.unit_label) if continuous else "%"
    source = fit.family if fit.family in ("supplied", "unit summary") else "fitted"
    family, ratio_word = FIT_SETTINGS.families.get(
        fit.family, ("none: expected values were supplied", "ratio")
    )
    coefficients = [
        {
            "term": markdown_literal(t),
            "ratio": f"{r['ratio']:.3f}",
            "interval": f"{r['lower']:.3f} to {r['upper']:.3f}",
        }
        for t, r in fit.coefficients.iterrows()
    ]
    equity, equity_summary = _equity_rows(m)
    roc_path = model_figure_path(m.measure.key, "roc")
    cal_path = model_figure_path(m.measure.key, "calibration")
    return ModelView(
        key=m.measure.key,
        name=markdown_literal(m.measure.name),
        measure_href=f"measures/{m.measure.key}.qmd",
        source=source,
        family=family,
        ratio_word=ratio_word.capitalize(),
        formula=code_span(fit.formula),
        patients=f"{fit.patients:,}",
        units_in_fit=fit.units_in_fit,
        solver=fit.solver,
        extra=_family_notes(fit.family, fit.smearing, fit.dispersion),
        exclusions=_exclusion_notes(m, source),
        coefficients=coefficients,
        validation=_validation_rows(v, unit) if v is not None else [],
        folds=v.folds if v is not None else 0,
        groups=_risk_group_rows(v) if v is not None else [],
        quality=_model_quality(m),
        roc=captions.roc(m, roc_path) if roc_path in drawn else None,
        calibration=captions.calibration(m, cal_path, unit) if cal_path in drawn else None,
        equity=equity,
        equity_summary=equity_summary,
        social_risk=", ".join(markdown_literal(s) for s in m.measure.social_risk),
    )


def _family_notes(family: str, smearing: float, dispersion: float) -> list[str]:
    """Sentences about the smearing factor or the dispersion of a continuous model."""
    if family == "lognormal":
        return [
            f"Duan's smearing factor is {smearing:.3f}: the back-transformed means are "
            f"multiplied by it; the residual variance on the log scale is {dispersion:.3f}."
        ]
    if family == "gamma":
        return [
            f"The Pearson dispersion of the Gamma fit is {dispersion:.3f} (a Gamma shape "
            f"of about {1 / dispersion:.2f})."
        ]
    return []


def _exclusion_notes(m: MeasureResult, source: str) -> list[str]:
    """Patients left out, or with a value filled in, because a risk factor was missing."""
    ex = m.casemix.exclusions or {}
    exclusions = []
    if ex.get("dropped_rows"):
        per_var = ", ".join(f"{markdown_literal(k)} {n:,}" for k, n in ex["dropped"].items())
        exclusions.append(
            f"{ex['dropped_rows']:,} patients were left out of this measure because a risk "
            f"factor was missing (by risk factor: {per_var}). "
            "They are not counted in any unit's cases. Patients left out, by unit: "
            f"{_losses(m)}."
        )
    if ex.get("imputed_rows"):
        per_var = ", ".join(f"{markdown_literal(k)} {n:,}" for k, n in ex["imputed"].items())
        exclusions.append(
            f"{ex['imputed_rows']:,} patients had a missing risk factor filled in with the "
            "most common value (categories) or the median (numbers) (by risk factor: "
            f"{per_var})."
        )
    if source == "fitted" and not exclusions:
        exclusions.append(
            "No patient was left out or had a value filled in: every risk factor was recorded "
            "for every patient."
        )
    return exclusions


def _validation_rows(v: Validation, unit: str) -> list[dict[str, str]]:
    """One row per validation metric: in sample and cross-validated."""
    rows = []
    cross = v.cross_validated
    for key in BINARY_ROWS if v.binary else CONTINUOUS_ROWS:
        inside = v.in_sample.values[key]
        cv = cross.values[key] if cross is not None else float("nan")
        if key == "c_statistic":
            lo, hi = v.in_sample.values["c_lower"], v.in_sample.values["c_upper"]
            shown = f"{inside:.3f} ({lo:.3f} to {hi:.3f})"
            shown_cv = (
                f"{cv:.3f} ({cross.values['c_lower']:.3f} to {cross.values['c_upper']:.3f})"
                if cross is not None
                else "not applicable"
            )
        elif key == "hl_statistic":
            shown = f"{inside:.2f} on {v.in_sample.values['hl_df']:.0f} df"
            shown_cv = (
                f"{cv:.2f} on {cross.values['hl_df']:.0f} df"
                if cross is not None
                else "not applicable"
            )
        else:
            shown = _fmt(key, inside, unit)
            shown_cv = _fmt(key, cv, unit) if cross is not None else "not applicable"
        label = FIT_SETTINGS.metric_labels[key] + (
            " (95% interval, DeLong)" if key == "c_statistic" else ""
        )
        if key in ("sensitivity", "specificity", "ppv"):
            label += f" ({v.threshold * 100:.1f}%)"
        rows.append({"label": label, "in_sample": shown, "cross_validated": shown_cv})
    return rows


def _risk_group_rows(v: Validation) -> list[dict[str, str]]:
    """Expected against observed per risk group, in sample and cross-validated."""
    k = 100.0 if v.binary else 1.0
    cvg = v.cross_validated.groups if v.cross_validated is not None else None
    groups = []
    for i, g in v.in_sample.groups.iterrows():
        cv_expected = cv_observed = ""
        if cvg is not None and i < len(cvg):
            cv_expected = f"{cvg['expected_mean'].iloc[i] * k:.2f}"
            cv_observed = f"{cvg['observed_mean'].iloc[i] * k:.2f}"
        groups.append(
            {
                "group": f"{int(g['group'])}",
                "patients": f"{int(g['patients']):,}",
                "expected": f"{g['expected_mean'] * k:.2f}",
                "observed": f"{g['observed_mean'] * k:.2f}",
                "ratio": f"{g['predictive_ratio']:.2f}" if g["observed"] > 0 else "not defined",
                "cv_expected": cv_expected,
                "cv_observed": cv_observed,
            }
        )
    return groups


def _equity_rows(m: MeasureResult) -> tuple[list[dict[str, str]], str]:
    """Each reported unit's position with and without the social-risk factors, and a summary."""
    if m.equity is None:
        return [], ""
    equity = [
        {
            "name": markdown_literal(e["unit_name"]),
            "with": POSITION.get(e["position_with"], ""),
            "without": POSITION.get(e["position_without"], ""),
            "changed": "changes" if e["changed"] else "same",
        }
        for _, e in m.equity.sort_values(
            ["changed", "unit_name"], ascending=[False, True]
        ).iterrows()
    ]
    n_changed = int(m.equity["changed"].sum())
    summary = (
        f"{n_changed} of {len(m.equity)} reported units "
        f"{'changes' if n_changed == 1 else 'change'} position when the "
        "social-risk factors are left out of the case-mix model."
    )
    return equity, summary
