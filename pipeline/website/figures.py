"""Figures (plotnine): what each measure and each unit looks like, as SVG (PNG beside where useful).

Every figure has a *data* function (a small DataFrame: exactly what is drawn) and a *draw*
function. Pages build the alt text and the data table beside each figure from the same data
(``captions.py``), so the words and the picture cannot disagree.

Groups are shown by marker shape *and* colour *and* words (legend or label), never colour alone.
Colours come from the Okabe & Ito (2008) colour-blind-safe palette, darkened where needed so every
mark passes WCAG 2.1 AA for graphics (3:1 on white; checked in ``tests/test_public.py``).

Speed: a site of 200 units needs 200 unit strips. The strip's frame (facets, scales, network
bands, benchmark lines) is built once by plotnine; for each unit only the unit's marks are moved
before the file is written. ``drawing.py`` schedules the drawing and caches every file by the hash
of its data and of this module.
"""

from __future__ import annotations

import hashlib
import io
import warnings
from pathlib import Path

import matplotlib
import numpy as np
import pandas as pd
import plotnine as p9

from pipeline.results import GROUPS

matplotlib.use("Agg")
matplotlib.rcParams.update(
    {"svg.fonttype": "none", "svg.hashsalt": "fairgauge", "font.family": "DejaVu Sans"}
)

# group key -> (colour, marker); the words are GROUPS[key]. Shared with captions and pages.
GROUP_MARKS = {
    "better": ("#0072B2", "s"),  # blue square
    "typical": ("#4D4D4D", "o"),  # dark grey circle
    "worse": ("#C85200", "^"),  # darkened vermillion triangle
}
BENCHMARK_INK = "#000000"
BAND_FILL = "#DCE3EA"  # background band only; never the sole carrier of meaning
DPI = 110
MAX_FIGURE_UNITS = 300  # above this a chart with one row per unit is unreadable and slow to draw


LEGEND = "Group"


def _group_scales():
    labels = {k: GROUPS[k] for k in GROUP_MARKS}
    return [
        p9.scale_color_manual(
            values={k: c for k, (c, _) in GROUP_MARKS.items()},
            labels=labels,
            name=LEGEND,
            drop=False,
            limits=list(GROUP_MARKS),
        ),
        p9.scale_shape_manual(
            values={k: s for k, (_, s) in GROUP_MARKS.items()},
            labels=labels,
            name=LEGEND,
            drop=False,
            limits=list(GROUP_MARKS),
        ),
    ]


def _theme(width: float, height: float):
    return p9.theme_bw(base_size=10) + p9.theme(
        figure_size=(width, height),
        legend_position="bottom",
        legend_direction="vertical",
        panel_grid_minor=p9.element_blank(),
    )


def _save(plot, path: Path, png: bool) -> None:
    """Write ``path`` (.svg) and, when asked, a .png beside it, from one drawing."""
    path.parent.mkdir(parents=True, exist_ok=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fig = plot.draw()
        fig.savefig(path, metadata={"Date": None})
        if png:
            fig._layout_engine = None  # laid out by the first save; see draw_positions
            fig.savefig(path.with_suffix(".png"), dpi=DPI)
    matplotlib.pyplot.close(fig)


# a change to the drawing code redraws every figure (part of each figure's cache key)
DRAWING_CODE = hashlib.sha256(Path(__file__).read_bytes()).hexdigest()


# --- measure figures -------------------------------------------------------------------------


def _unit_axis(names: pd.Series) -> pd.Categorical:
    """Units in drawing order; identical names are told apart so each keeps its own row."""
    labels = list(names)
    seen: dict[str, int] = {}
    for i, name in enumerate(labels):
        seen[name] = seen.get(name, 0) + 1
        if seen[name] > 1:
            labels[i] = f"{name} ({seen[name]})"
    return pd.Categorical(labels, categories=labels, ordered=True)


def draw_intervals(data: pd.DataFrame, benchmark: float, label: str, path: Path, png: bool) -> None:
    """All reported units' adjusted values with credible intervals against the benchmark (both
    already scaled)."""
    data = data.assign(unit=_unit_axis(data["unit_name"]))
    # Units on the y axis directly (no coord_flip) and one drawing group per colour: plotnine
    # otherwise draws every unit as its own group, which is slow for hundreds of units.
    plot = (
        p9.ggplot(data, p9.aes(y="unit", colour="group", shape="group", group="group"))
        + p9.geom_vline(xintercept=benchmark, linetype="dashed", colour=BENCHMARK_INK)
        + p9.geom_segment(p9.aes(x="lo", xend="hi", yend="unit"), size=0.8)
        + p9.geom_point(p9.aes(x="rsr"), size=2.6, fill="white")
        + _group_scales()
        + p9.labs(y="", x=f"{label}\n(dashed line: benchmark {benchmark:.1f})")
        + _theme(7.5, max(3.0, 1.6 + 0.19 * len(data)))
    )
    _save(plot, path, png)


def draw_movement(data: pd.DataFrame, benchmark: float, label: str, path: Path, png: bool) -> None:
    """A line per unit from its raw value (hollow circle) to its adjusted value (group marker), at
    its number of cases.

    Cases on a log scale up the side: small units sit low and move furthest. Unit names are in
    the table beside the figure, which keeps the chart readable (and quick) for hundreds of units.
    """
    short_label = label.replace("Adjusted mean", "Mean").replace("Risk-standardised rate", "Rate")
    plot = (
        p9.ggplot(data, p9.aes(y="cases", group="group"))
        + p9.geom_vline(xintercept=benchmark, linetype="dashed", colour=BENCHMARK_INK)
        + p9.geom_segment(
            p9.aes(x="raw", xend="adjusted", yend="cases"), colour="#595959", size=0.6
        )
        + p9.geom_point(p9.aes(x="raw"), shape="o", fill="white", colour="#595959", size=2.2)
        + p9.geom_point(p9.aes(x="adjusted", colour="group", shape="group"), size=2.6)
        + _group_scales()
        + p9.scale_y_log10()
        + p9.labs(
            y="Cases (log scale)",
            x=f"{short_label}\n"
            f"hollow circle: raw; marker: adjusted; dashed line: benchmark {benchmark:.1f}",
        )
        + _theme(7.5, 5.6)
    )
    _save(plot, path, png)


def draw_funnel(
    points: pd.DataFrame, curves: pd.DataFrame, benchmark: float, label: str, path: Path, png: bool
) -> None:
    """Each unit's value from its O/E against the precision of that O/E, with 95% and 99.8% control
    limits (scaled)."""
    long = curves.melt(id_vars="precision", var_name="limit", value_name="value")
    long["limits"] = np.where(long["limit"].str.endswith("998"), "99.8% limits", "95% limits")
    long["side"] = long["limit"].str.split("_").str[0]
    plot = (
        p9.ggplot()
        + p9.geom_hline(yintercept=benchmark, colour=BENCHMARK_INK)
        + p9.geom_line(
            long,
            p9.aes(x="precision", y="value", linetype="limits", group="limit"),
            colour="#3A3A3A",
        )
        + p9.geom_point(
            points, p9.aes(x="precision", y="value", colour="group", shape="group"), size=2.4
        )
        + p9.scale_linetype_manual(
            values={"95% limits": "dashed", "99.8% limits": "dotted"}, name="Control limits"
        )
        + _group_scales()
        + p9.scale_x_log10()
        + p9.labs(
            x="Precision of the unit's O/E (log scale; grows with its expected events)",
            y=f"{label.replace('Risk-standardised rate', 'Adjusted rate')} from O/E\n(solid "
            f"line: benchmark {benchmark:.1f})",
        )
        + _theme(7.5, 5.6)
        + p9.theme(legend_box="horizontal")
    )
    _save(plot, path, png)


# --- unit figures ----------------------------------------------------------------------------


def _x_limits(frame: pd.DataFrame) -> tuple[float, float]:
    lo = float(np.clip(np.nanmin(frame["x_min"].to_numpy()), 0.2, 0.9))
    hi = float(np.clip(np.nanmax(frame["x_max"].to_numpy()), 1.12, 5.0))
    return lo / 1.05, hi * 1.05


def draw_positions(frame: pd.DataFrame, items: list[tuple[str, pd.DataFrame]]) -> None:
    """Unit strips: the frame is drawn once with plotnine, then each unit's marks are placed and
    saved.

    One row per measure on a single panel (fewer artists than facets, so each file is quick to
    write).
    """
    measures = list(frame["measure"])
    rows = np.arange(len(measures))[::-1].astype(float)  # first measure on top
    lo, hi = _x_limits(frame)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fig = _strip_frame(frame, measures, rows, lo, hi).draw()
    # Let plotnine's layout engine place everything once, then drop the engine: with an engine,
    # matplotlib draws the whole figure twice per save. (set_layout_engine(None) refuses to drop an
    # engine whose colour-bar settings differ, hence the attribute.)
    fig.canvas.draw()
    fig.savefig(io.BytesIO(), format="svg")
    fig._layout_engine = None  # type: ignore[attr-defined]
    marks = _unit_marks(fig.axes[0], rows)
    for path, data in items:
        for (line, point, text, y), (_, r) in zip(marks, data.iterrows(), strict=True):
            if pd.isna(r["ratio"]):
                line.set_data([], [])
                point.set_data([], [])
                text.set_text("not reported")
                continue
            colour, marker = GROUP_MARKS[r["group"]]
            # plotnine draws a log10 scale in transformed units: place the marks the same way
            line.set_data(np.log10([max(r["lo"], lo), min(r["hi"], hi)]), [y, y])
            line.set_color(colour)
            point.set_data([np.log10(r["ratio"])], [y])
            point.set_marker(marker)
            point.set_markeredgecolor(colour)
            text.set_text(GROUPS[r["group"]])
        Path(path).parent.mkdir(parents=True, exist_ok=True)
        fig.savefig(path, metadata={"Date": None})
    matplotlib.pyplot.close(fig)


def _strip_frame(
    frame: pd.DataFrame, measures: list, rows: np.ndarray, lo: float, hi: float
) -> p9.ggplot:
    """What every unit strip shares: bands where most units sit, benchmark lines, scales."""
    f = frame.assign(
        row=rows, bottom=rows - 0.36, top=rows + 0.36, b_lo=rows - 0.45, b_hi=rows + 0.45
    )
    return (
        p9.ggplot(f)
        + p9.geom_rect(
            p9.aes(xmin="band_lo", xmax="band_hi", ymin="bottom", ymax="top"),
            fill=BAND_FILL,
            na_rm=True,
        )
        + p9.geom_segment(
            p9.aes(x="bench", xend="bench", y="b_lo", yend="b_hi"),
            linetype="dashed",
            colour=BENCHMARK_INK,
        )
        + p9.scale_x_log10(limits=(lo, hi))
        + p9.scale_y_continuous(
            breaks=list(rows), labels=measures, limits=(-0.6, len(measures) - 0.4)
        )
        + p9.labs(x="Adjusted ratio to the benchmark (log scale)", y="")
        + p9.theme_bw(base_size=9)
        + p9.theme(
            figure_size=(7.5, 0.9 + 0.42 * len(measures)),
            panel_grid_minor=p9.element_blank(),
            panel_grid_major_y=p9.element_blank(),
        )
    )


def _unit_marks(ax, rows: np.ndarray) -> list[tuple]:
    """Per measure row: an empty interval line, marker and label, moved for each unit."""
    from matplotlib.lines import Line2D
    from matplotlib.transforms import blended_transform_factory

    at_right = blended_transform_factory(ax.transAxes, ax.transData)
    marks = []
    for row in rows:
        line = Line2D([], [], linewidth=2.4)
        point = Line2D(
            [], [], linestyle="none", markersize=8, markerfacecolor="white", markeredgewidth=1.8
        )
        ax.add_line(line)
        ax.add_line(point)
        text = ax.text(
            0.99,
            row,
            "",
            transform=at_right,
            ha="right",
            va="center",
            fontsize=8.5,
            color=BENCHMARK_INK,
        )
        marks.append((line, point, text, row))
    return marks


def draw_trend(data: pd.DataFrame, path: Path, png: bool) -> None:
    """A unit's adjusted value per cycle with its interval, one panel per measure."""
    periods = list(dict.fromkeys(data.sort_values("order")["period"]))
    data = data.assign(
        period=pd.Categorical(data["period"], categories=periods, ordered=True),
        measure=pd.Categorical(data["measure"], categories=list(dict.fromkeys(data["measure"]))),
    )
    plot = (
        p9.ggplot(data, p9.aes(x="period", y="value", ymin="lo", ymax="hi", group="measure"))
        + p9.geom_line(colour="#595959")
        + p9.geom_linerange(size=0.8, colour="#0B3D91")
        + p9.geom_point(size=2.4, colour="#0B3D91")
        + p9.facet_wrap("measure", ncol=2, scales="free_y")
        + p9.labs(x="Cycle", y="Adjusted value (% for rates)")
        + _theme(7.5, 1.6 + 1.5 * ((data["measure"].nunique() + 1) // 2))
    )
    _save(plot, path, png)


# --- model report figures --------------------------------------------------------------------


# Okabe-Ito blue, darkened vermillion
FITS = {"In sample": ("#0072B2", "solid"), "Cross-validated": ("#C85200", "dashed")}


def _fit_scales(data: pd.DataFrame):
    names = list(dict.fromkeys(data["fit"]))
    colours = {n: FITS["In sample" if n == "In sample" else "Cross-validated"][0] for n in names}
    lines = {n: FITS["In sample" if n == "In sample" else "Cross-validated"][1] for n in names}
    return [
        p9.scale_color_manual(values=colours, name=""),
        p9.scale_linetype_manual(values=lines, name=""),
    ]


def draw_roc(data: pd.DataFrame, path: Path, png: bool) -> None:
    """ROC curve(s) with the diagonal of a coin toss."""
    plot = (
        p9.ggplot(
            data,
            p9.aes(x="false_positive_rate", y="true_positive_rate", colour="fit", linetype="fit"),
        )
        + p9.geom_abline(intercept=0, slope=1, colour="#595959", linetype="dotted")
        + p9.geom_line(size=0.9)
        + _fit_scales(data)
        + p9.coord_equal()
        + p9.labs(x="False-positive rate (1 - specificity)", y="True-positive rate (sensitivity)")
        + _theme(5.0, 5.0)
    )
    _save(plot, path, png)


def draw_calibration(data: pd.DataFrame, label: str, path: Path, png: bool) -> None:
    """Observed against expected by risk group; points on the diagonal are perfectly calibrated."""
    top = float(max(data["expected"].max(), data["observed"].max())) * 1.05
    plot = (
        p9.ggplot(data, p9.aes(x="expected", y="observed", colour="fit", shape="fit"))
        + p9.geom_abline(intercept=0, slope=1, colour="#595959", linetype="dotted")
        + p9.geom_line(p9.aes(linetype="fit"), size=0.6)
        + p9.geom_point(size=2.6)
        + _fit_scales(data)
        + p9.scale_shape_manual(
            values={n: ("o" if n == "In sample" else "^") for n in data["fit"].unique()}, name=""
        )
        + p9.coord_equal(xlim=(0, top), ylim=(0, top))
        + p9.labs(x=f"Expected ({label})", y=f"Observed ({label})")
        + _theme(5.0, 5.0)
    )
    _save(plot, path, png)
