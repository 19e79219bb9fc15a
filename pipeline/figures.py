"""Figures (plotnine): adjusted rates with intervals, per measure and per unit.

Position against the benchmark is shown by marker shape *and* colour *and* legend words,
never colour alone. Colours are from the Okabe & Ito (2008) colour-blind-safe palette.
"""

from __future__ import annotations

import hashlib
import shutil
import warnings
from pathlib import Path

import pandas as pd
import plotnine as p9

from .cache import Cache, key
from .results import POSITION, MeasureResult

# position key -> (colour, marker); a data table so pages and figures agree.
MARKS = {
    "above": ("#D55E00", "^"),  # vermillion, triangle up
    "spans": ("#4D4D4D", "o"),  # dark grey, circle
    "below": ("#0072B2", "v"),  # blue, triangle down
}
_LABELS = {k: POSITION[k] for k in MARKS}
DPI = 110
MAX_FIGURE_UNITS = 300  # above this a chart with one row per unit is unreadable and slow to draw


LEGEND = "Where the credible interval sits"


def _scales():
    return [
        p9.scale_color_manual(values={k: c for k, (c, _) in MARKS.items()}, labels=_LABELS, name=LEGEND, drop=False, limits=list(MARKS)),
        p9.scale_shape_manual(values={k: s for k, (_, s) in MARKS.items()}, labels=_LABELS, name=LEGEND, drop=False, limits=list(MARKS)),
    ]


def _theme(height: float):
    return p9.theme_bw(base_size=10) + p9.theme(
        figure_size=(7.5, height), legend_position="bottom", legend_direction="vertical", panel_grid_minor=p9.element_blank()
    )


def _save(plot, path: Path) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        plot.save(path, dpi=DPI, verbose=False)


_SOURCE = hashlib.sha256(Path(__file__).read_bytes()).hexdigest()  # drawing code changes redraw


def measure_figure_path(measure_key: str) -> str:
    return f"figures/measure-{measure_key}.png"


def unit_figure_path(unit_slug: str) -> str:
    return f"figures/unit-{unit_slug}.png"


def cached_figure(project: Path, relative: str, draw, data: pd.DataFrame, cache: Cache, *extra) -> str:
    """Draw ``data`` with ``draw`` into ``project/relative`` (or copy it from the cache); return ``relative``."""
    path = project / relative
    name = key("figure", draw.__name__, data.to_csv(), extra, _SOURCE) + ".png"
    hit = cache.file(name)
    path.parent.mkdir(parents=True, exist_ok=True)
    if hit is not None:
        shutil.copyfile(hit, path)
    else:
        draw(data, *extra, path)
        cache.store_file(name, path)
    return relative


def axis(result: MeasureResult) -> tuple[float, str]:
    """(multiplier, axis label) for a measure's adjusted values: percent for rates, the outcome's unit otherwise."""
    if result.measure.type == "continuous":
        return 1.0, f"Adjusted mean, {result.measure.unit_label}"
    return 100.0, "Risk-standardised rate, %"


def measure_figure_data(result: MeasureResult) -> pd.DataFrame:
    """What the measure figure shows: reported units, lowest adjusted value first."""
    t = result.table[result.table["status"] == "reported"].sort_values("rsr_median")
    k = axis(result)[0]
    return pd.DataFrame(
        {"unit_name": t["unit_name"], "rsr": t["rsr_median"] * k, "lo": t["rsr_lower"] * k, "hi": t["rsr_upper"] * k, "position": t["position"]}
    )


def draw_measure(data: pd.DataFrame, benchmark: float, label: str, path: Path) -> None:
    """All reported units' adjusted values with credible intervals against the benchmark (both already scaled)."""
    order = list(data["unit_name"])
    data = data.assign(unit=pd.Categorical(data["unit_name"], categories=order, ordered=True))
    plot = (
        p9.ggplot(data, p9.aes(x="unit", y="rsr", ymin="lo", ymax="hi", colour="position", shape="position"))
        + p9.geom_hline(yintercept=benchmark, linetype="dashed", colour="#000000")
        + p9.geom_linerange(size=0.8)
        + p9.geom_point(size=2.6, fill="white")
        + p9.coord_flip()
        + _scales()
        + p9.labs(x="", y=f"{label} (dashed line: benchmark {benchmark:.1f})")
        + _theme(max(3.0, 1.6 + 0.19 * len(order)))
    )
    _save(plot, path)


def unit_figure_data(unit_id: str, results: list[MeasureResult]) -> pd.DataFrame | None:
    """What a unit's figure shows: its reported measures (None when none is reported)."""
    rows = []
    for r in results:
        row = r.table[(r.table["unit_id"] == unit_id) & (r.table["status"] == "reported")]
        if len(row):
            rows.append(row.assign(measure_name=r.measure.name, bench=r.benchmark / r.network_rate))
    if not rows:
        return None
    return pd.concat(rows)[["measure_name", "ratio_median", "ratio_lower", "ratio_upper", "position", "bench"]]


def draw_unit(data: pd.DataFrame, path: Path) -> None:
    """A unit's adjusted ratio to the network on each reported measure."""
    data = data.assign(measure_name=pd.Categorical(data["measure_name"], categories=list(data["measure_name"])[::-1]))
    plot = (
        p9.ggplot(data, p9.aes(x="measure_name", y="ratio_median", ymin="ratio_lower", ymax="ratio_upper", colour="position", shape="position"))
        # The benchmark as a ratio to the network rate: 1 unless a fixed benchmark is configured.
        + p9.geom_point(p9.aes(x="measure_name", y="bench"), inherit_aes=False, shape="|", size=9, colour="#000000")
        + p9.geom_linerange(size=0.8)
        + p9.geom_point(size=3, fill="white")
        + p9.coord_flip()
        + _scales()
        + p9.labs(x="", y="Adjusted ratio to the network\n(1 = as many events as expected for these patients; black bar: benchmark)")
        + _theme(1.9 + 0.45 * len(data))
    )
    _save(plot, path)


def model_figure_path(measure_key: str, kind: str) -> str:
    return f"figures/model-{measure_key}-{kind}.png"


def roc_figure_data(result: MeasureResult) -> pd.DataFrame:
    """ROC curves, in-sample and cross-validated, one row per point."""
    v = result.validation
    parts = [v.in_sample.roc.assign(fit="In sample")]
    if v.cross_validated is not None:
        parts.append(v.cross_validated.roc.assign(fit=f"Cross-validated ({v.folds} folds)"))
    return pd.concat(parts, ignore_index=True)


FITS = {"In sample": ("#0072B2", "solid"), "Cross-validated": ("#D55E00", "dashed")}  # Okabe-Ito blue, vermillion


def _fit_scales(data: pd.DataFrame):
    names = list(dict.fromkeys(data["fit"]))
    colours = {n: FITS["In sample" if n == "In sample" else "Cross-validated"][0] for n in names}
    lines = {n: FITS["In sample" if n == "In sample" else "Cross-validated"][1] for n in names}
    return [p9.scale_color_manual(values=colours, name=""), p9.scale_linetype_manual(values=lines, name="")]


def draw_roc(data: pd.DataFrame, path: Path) -> None:
    """ROC curve(s) with the diagonal of a coin toss."""
    plot = (
        p9.ggplot(data, p9.aes(x="false_positive_rate", y="true_positive_rate", colour="fit", linetype="fit"))
        + p9.geom_abline(intercept=0, slope=1, colour="#767676", linetype="dotted")
        + p9.geom_line(size=0.9)
        + _fit_scales(data)
        + p9.coord_equal()
        + p9.labs(x="False-positive rate (1 - specificity)", y="True-positive rate (sensitivity)")
        + _theme(5.0) + p9.theme(figure_size=(5.0, 5.0))
    )
    _save(plot, path)


def calibration_figure_data(result: MeasureResult) -> pd.DataFrame:
    """Observed against expected mean per risk group, in-sample and cross-validated (percent for rates)."""
    v = result.validation
    k = 100.0 if v.binary else 1.0
    parts = [("In sample", v.in_sample)] + ([(f"Cross-validated ({v.folds} folds)", v.cross_validated)] if v.cross_validated else [])
    return pd.concat(
        [pd.DataFrame({"group": m.groups["group"], "expected": m.groups["expected_mean"] * k, "observed": m.groups["observed_mean"] * k, "fit": name})
         for name, m in parts],
        ignore_index=True,
    )


def draw_calibration(data: pd.DataFrame, label: str, path: Path) -> None:
    """Observed against expected by risk group; points on the diagonal are perfectly calibrated."""
    top = float(max(data["expected"].max(), data["observed"].max())) * 1.05
    plot = (
        p9.ggplot(data, p9.aes(x="expected", y="observed", colour="fit", shape="fit"))
        + p9.geom_abline(intercept=0, slope=1, colour="#767676", linetype="dotted")
        + p9.geom_line(p9.aes(linetype="fit"), size=0.6)
        + p9.geom_point(size=2.6)
        + _fit_scales(data)
        + p9.scale_shape_manual(values={n: ("o" if n == "In sample" else "^") for n in data["fit"].unique()}, name="")
        + p9.coord_equal(xlim=(0, top), ylim=(0, top))
        + p9.labs(x=f"Expected ({label})", y=f"Observed ({label})")
        + _theme(5.0) + p9.theme(figure_size=(5.0, 5.0))
    )
    _save(plot, path)
