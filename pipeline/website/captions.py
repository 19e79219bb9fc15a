"""Words and numbers beside every figure: alt text made from the figure's data, and its data table.

Each function takes exactly the DataFrame a figure was drawn from (``figures.py``) and returns a
``FigureView``: a short caption (shown), the alt text (for screen readers, generated from the data),
and the table of the numbers drawn. Text from the data is made safe by the caller's
``markdown_literal`` (for markdown) and ``attribute_literal`` (for attribute values).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from pipeline.results import GROUPS, MeasureResult
from pipeline.website.markup import attribute_literal, markdown_literal

NAMES_IN_ALT = 5  # list at most this many units by name in a sentence of alt text


@dataclass(frozen=True)
class FigureView:
    src: str  # relative path of the SVG from the project root ("" when not drawn)
    png: str  # relative path of the PNG fallback, or ""
    caption: str  # markdown, shown under the picture
    alt: str  # attribute-safe text
    head: list[str] = field(default_factory=list)
    rows: list[list[str]] = field(default_factory=list)
    # intervals, movement, funnel, position, trend, roc or calibration: templates place a figure by
    # it
    kind: str = ""


def _names(names: list[str], escape) -> str:
    """Up to NAMES_IN_ALT unit names, each through ``escape``, and how many more."""
    shown = [escape(n) for n in names[:NAMES_IN_ALT]]
    more = len(names) - len(shown)
    text = ", ".join(shown)
    return text + (f" and {more} more" if more > 0 else "")


def _group_counts(groups: pd.Series, names: pd.Series) -> str:
    parts = []
    for g in ("worse", "better", "typical"):
        picked = list(names[groups == g])
        if g == "typical":
            parts.append(f"{len(picked)} {'is' if len(picked) == 1 else 'are'} {GROUPS[g].lower()}")
        elif picked:
            parts.append(f"{len(picked)} {GROUPS[g].lower()} ({_names(picked, attribute_literal)})")
        else:
            parts.append(f"none {GROUPS[g].lower()}")
    return "; ".join(parts)


def intervals(
    src: str, png: str, data: pd.DataFrame, fmt, span, benchmark: str, level: str
) -> FigureView:
    """``fmt(x)`` formats one scaled value; ``span(lo, hi)`` an interval."""
    low, high = data.iloc[0], data.iloc[-1]
    alt = (
        f"Chart of the adjusted value of {len(data)} units, each with its {level} credible "
        "interval, lowest first, "
        f"against a dashed benchmark line at {benchmark}. Of these units, "
        f"{_group_counts(data['group'], data['unit_name'])}. "
        f"Lowest: {attribute_literal(low['unit_name'])}, {fmt(low['rsr'])}; highest: "
        f"{attribute_literal(high['unit_name'])}, {fmt(high['rsr'])}."
    )
    rows = [
        [markdown_literal(r.unit_name), fmt(r.rsr), span(r.lo, r.hi), GROUPS[r.group]]
        for r in data.itertuples()
    ]
    return FigureView(
        src,
        png,
        f"Each unit's adjusted value (marker) and {level} credible interval (line). The dashed "
        "line is the benchmark.",
        alt,
        ["Unit", "Adjusted", f"{level} interval", "Group"],
        rows,
        kind="intervals",
    )


def movement(
    src: str, png: str, data: pd.DataFrame, fmt, benchmark: str, points: str
) -> FigureView:
    """``points`` names the unit of a move ('percentage points' or the outcome's unit)."""
    move = (data["adjusted"] - data["raw"]).abs()
    k = min(10, max(1, len(data) // 4))
    small, large = float(np.median(move.iloc[:k])), float(np.median(move.iloc[-k:]))
    top = data.loc[move.idxmax()]
    alt = (
        f"Chart with a line for each of {len(data)} units, from its raw value to its adjusted "
        "value, placed by its number of cases (log scale, fewest at the bottom). "
        f"Small units move further: the typical move is {small:.1f} {points} for the {k} "
        f"smallest units and {large:.1f} for the {k} largest. "
        f"The largest move is {attribute_literal(top['unit_name'])}, from {fmt(top['raw'])} to "
        f"{fmt(top['adjusted'])}. The benchmark is {benchmark}."
    )
    rows = [
        [
            markdown_literal(r.unit_name),
            f"{r.cases:,}",
            fmt(r.raw),
            fmt(r.adjusted),
            f"{r.adjusted - r.raw:+.1f}",
        ]
        for r in data.iloc[::-1].itertuples()
    ]
    return FigureView(
        src,
        png,
        "Each line runs from a unit's raw value (hollow circle) to its adjusted value "
        "(marker). Small units are pulled further towards the typical unit.",
        alt,
        ["Unit", "Cases", "Raw", "Adjusted", "Move"],
        rows,
        kind="movement",
    )


def funnel(
    src: str,
    png: str,
    points: pd.DataFrame,
    fmt,
    benchmark: str,
    counts: dict,
    phi: float,
    widened: bool,
) -> FigureView:
    alt = _funnel_alt(points, benchmark, counts, phi, widened)
    rows = [
        [
            markdown_literal(r.unit_name),
            f"{r.cases:,.0f}",
            f"{r.expected:,.1f}",
            fmt(r.value),
            f"{fmt(r.lower_95)} to {fmt(r.upper_95)}",
            f"{fmt(r.lower_998)} to {fmt(r.upper_998)}",
            "above" if r.value > r.upper_998 else "below" if r.value < r.lower_998 else "inside",
        ]
        for r in points.sort_values("precision").itertuples()
    ]
    return FigureView(
        src,
        png,
        (
            "Each marker is a unit. Its height is what the unit observed, divided by what was "
            "expected for its patients (O/E), "
            "times the benchmark. This uses the unit's own counts only, with no pull towards "
            "other units. "
            "The funnel lines show how far from the benchmark a unit with that many expected "
            "events could land by chance alone (95% and 99.8% of the time)."
        ),
        alt,
        [
            "Unit",
            "Cases",
            "Expected",
            "Value from O/E",
            "95% limits",
            "99.8% limits",
            "Against the 99.8% limits",
        ],
        rows,
        kind="funnel",
    )


def _funnel_alt(
    points: pd.DataFrame, benchmark: str, counts: dict, phi: float, widened: bool
) -> str:
    """The funnel plot's alt text: what it shows, and the units outside its limits by name."""
    out95 = points[(points["value"] < points["lower_95"]) | (points["value"] > points["upper_95"])]
    out998 = points[
        (points["value"] < points["lower_998"]) | (points["value"] > points["upper_998"])
    ]
    names95 = f" ({_names(list(out95['unit_name']), attribute_literal)})" if len(out95) else ""
    names998 = f" ({_names(list(out998['unit_name']), attribute_literal)})" if len(out998) else ""
    return (
        f"Funnel plot of {counts['units']} units: each unit's case-mix-adjusted value from its "
        "observed and expected counts, against the "
        "precision of its O/E on a log scale (higher for units with more expected events), "
        f"with 95% and 99.8% control limits around the benchmark of {benchmark}"
        f"{', widened for the extra spread between units' if widened else ''}. "
        f"{len(out95)} {'unit lies' if len(out95) == 1 else 'units lie'} outside the 95% limits"
        f"{names95} and "
        f"{len(out998)} outside the 99.8% limits"
        f"{names998}. "
        f"The spread between units is {phi:.1f} times what chance alone would give."
    )


def position(src: str, data: pd.DataFrame, unit_name: str) -> FigureView:
    parts = []
    for r in data.itertuples():
        if pd.isna(r.ratio):
            parts.append(f"{attribute_literal(r.measure)}: not reported")
        else:
            parts.append(
                f"{attribute_literal(r.measure)}: {r.ratio:.2f} ({r.lo:.2f} to {r.hi:.2f}), "
                f"{GROUPS[r.group].lower()}"
            )
    alt = (
        f"Chart of {attribute_literal(unit_name)}'s adjusted ratio to the benchmark on each "
        "measure, with "
        "its interval, the benchmark and the range where most units sit. " + "; ".join(parts) + "."
    )
    rows = [
        [
            markdown_literal(r.measure),
            "" if pd.isna(r.ratio) else f"{r.ratio:.2f}",
            "" if pd.isna(r.ratio) else f"{r.lo:.2f} to {r.hi:.2f}",
            "not reported" if pd.isna(r.ratio) else GROUPS[r.group],
        ]
        for r in data.itertuples()
    ]
    return FigureView(
        src,
        "",
        "A ratio of 1 means as many events as expected for these patients. The shaded band is "
        "where most units sit; the dashed line is the benchmark.",
        alt,
        ["Measure", "Ratio to the benchmark", "Interval", "Group"],
        rows,
        kind="position",
    )


def trend(src: str, data: pd.DataFrame, unit_name: str) -> FigureView:
    parts = []
    for measure, d in data.groupby("measure", sort=False):
        parts.append(
            f"{attribute_literal(measure)}: "
            + ", ".join(
                f"{attribute_literal(r.period)} {r.value:.1f}"
                for r in d.sort_values("order").itertuples()
            )
        )
    alt = (
        f"Chart of {attribute_literal(unit_name)}'s adjusted value in each cycle, one panel "
        "per measure "
        "(percent for rates). " + "; ".join(parts) + "."
    )
    rows = [
        [
            markdown_literal(r.measure),
            markdown_literal(r.period),
            f"{r.value:.1f}",
            f"{r.lo:.1f} to {r.hi:.1f}",
        ]
        for r in data.sort_values(["measure", "order"]).itertuples()
    ]
    return FigureView(
        src,
        "",
        "Each point is the adjusted value published for that cycle, with its interval. Methods "
        "and coding can change between cycles.",
        alt,
        ["Measure", "Cycle", "Adjusted value", "Interval"],
        rows,
        kind="trend",
    )


def roc(m: MeasureResult, path: str) -> FigureView:
    """The model report's ROC curve: its words, alt text and table of points."""
    v = m.model_validation
    grid = [0.0, 0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.8, 1.0]

    def at(roc):
        return np.interp(grid, roc["false_positive_rate"], roc["true_positive_rate"])

    inside = at(v.in_sample.roc)
    cv = at(v.cross_validated.roc) if v.cross_validated is not None else None
    rows = [
        [f"{g:.2f}", f"{a:.3f}", f"{cv[i]:.3f}" if cv is not None else ""]
        for i, (g, a) in enumerate(zip(grid, inside, strict=True))
    ]
    return FigureView(
        path,
        "",
        "ROC curve: the further above the dotted diagonal, the better the model tells patients "
        "apart.",
        attribute_literal(_alt_roc(m)),
        [
            "False-positive rate",
            "True-positive rate, in sample",
            "True-positive rate, cross-validated",
        ],
        rows,
        kind="roc",
    )


def calibration(m: MeasureResult, path: str, unit: str) -> FigureView:
    """The model report's calibration plot: its words, alt text and table of risk groups."""
    v = m.model_validation
    k = 100.0 if v.binary else 1.0
    cvg = v.cross_validated.groups if v.cross_validated is not None else None
    rows = [
        [
            f"{int(g['group'])}",
            f"{g['expected_mean'] * k:.2f}",
            f"{g['observed_mean'] * k:.2f}",
            f"{cvg['expected_mean'].iloc[i] * k:.2f}" if cvg is not None and i < len(cvg) else "",
            f"{cvg['observed_mean'].iloc[i] * k:.2f}" if cvg is not None and i < len(cvg) else "",
        ]
        for i, g in v.in_sample.groups.iterrows()
    ]
    return FigureView(
        path,
        "",
        "Calibration: observed against expected by risk group; points on the dotted diagonal "
        "are perfectly calibrated.",
        attribute_literal(_alt_calibration(m, unit)),
        [
            "Risk group",
            f"Expected ({unit})",
            f"Observed ({unit})",
            "Expected, cross-validated",
            "Observed, cross-validated",
        ],
        rows,
        kind="calibration",
    )


def _alt_roc(m: MeasureResult) -> str:
    v = m.model_validation
    text = (
        f"ROC curve of the case-mix model for {m.measure.name}: the in-sample curve has "
        f"area {v.in_sample.values['c_statistic']:.3f}"
    )
    if v.cross_validated is not None:
        text += f", the cross-validated curve {v.cross_validated.values['c_statistic']:.3f}"
    return text + ". Both rise above the dotted diagonal of a coin toss"


def _alt_calibration(m: MeasureResult, unit: str) -> str:
    g = m.model_validation.in_sample.groups
    k = 100.0 if m.model_validation.binary else 1.0
    return (
        f"Calibration of the case-mix model for {m.measure.name}: observed against expected in "
        f"{len(g)} risk groups, from "
        f"{g['expected_mean'].iloc[0] * k:.1f} to {g['expected_mean'].iloc[-1] * k:.1f} {unit} "
        "expected and "
        f"{g['observed_mean'].iloc[0] * k:.1f} to {g['observed_mean'].iloc[-1] * k:.1f} {unit} "
        "observed; points on the dotted diagonal "
        "would be perfectly calibrated"
    )
