"""Figures (plotnine): what each measure and each unit looks like, as SVG (PNG beside where useful).

Every figure has a *data* function (a small DataFrame: exactly what is drawn) and a *draw*
function. Pages build the alt text and the data table beside each figure from the same data
(``captions.py``), so the words and the picture cannot disagree.

Groups are shown by marker shape *and* colour *and* words (legend or label), never colour alone.
Colours come from the Okabe & Ito (2008) colour-blind-safe palette, darkened where needed so every
mark passes WCAG 2.1 AA for graphics (3:1 on white; checked in ``tests/test_public.py``).

Speed: a site of 200 units needs 200 unit strips. The strip's frame (facets, scales, network
bands, benchmark lines) is built once by plotnine; for each unit only the unit's marks are moved
before the file is written. Drawing jobs run in up to ``WORKERS`` processes, and every file is
cached by the hash of its data and of this module.
"""

from __future__ import annotations

import hashlib
import io
import os
import shutil
import warnings
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import matplotlib
import numpy as np
import pandas as pd
import plotnine as p9

from pipeline.cache import Cache, key
from pipeline.results import GROUPS, MeasureResult

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
WORKERS = max(1, min(2, os.cpu_count() or 1))
PNG_MAX_UNITS = 100
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


_SOURCE = hashlib.sha256(Path(__file__).read_bytes()).hexdigest()  # drawing code changes redraw


# --- paths ---------------------------------------------------------------------------------


def measure_figure_path(measure_key: str, kind: str = "intervals") -> str:
    """kind: intervals | funnel | movement."""
    return f"figures/{kind}-{measure_key}.svg"


def unit_figure_path(unit_slug: str, kind: str = "position") -> str:
    """kind: position | trend."""
    return f"figures/{kind}-{unit_slug}.svg"


def png_of(relative: str) -> str:
    return relative[: -len(".svg")] + ".png"


# --- jobs and the cache ----------------------------------------------------------------------


@dataclass
class Job:
    """One drawing: ``draw(*args, path, png)`` writes ``relative`` (and its PNG when ``png``)."""

    relative: str
    draw: str  # name of a draw function in this module (picklable for worker processes)
    data: pd.DataFrame
    args: tuple = ()
    png: bool = False
    # the args as hashed text, when many jobs share them (computed once by the caller)
    args_text: str = ""
    cache_name: str = field(default="", init=False)

    def __post_init__(self):
        # DataFrames are hashed by their full CSV text (json's default=str would truncate them).
        args = self.args_text or tuple(
            a.to_csv() if isinstance(a, pd.DataFrame) else a for a in self.args
        )
        self.cache_name = key("figure", self.draw, self.data.to_csv(), args, self.png, _SOURCE)


def _run(job_draw: str, data: pd.DataFrame, args: tuple, path: str, png: bool) -> None:
    globals()[job_draw](data, *args, Path(path), png)


class Drawing:
    """Figures being drawn: the main process has drawn its share; ``wait`` collects the worker's."""

    def __init__(
        self, project: Path, jobs: list[Job], todo: list[Job], cache: Cache, pool, futures
    ):
        self.project, self.jobs, self.todo, self.cache, self.pool, self.futures = (
            project,
            jobs,
            todo,
            cache,
            pool,
            futures,
        )
        # Every planned file exists once ``wait`` returns: each SVG with the data it was drawn from
        # (pages build alt text and tables from exactly that), each PNG copy with None.
        self.drawn: dict[str, pd.DataFrame | None] = {job.relative: job.data for job in jobs}
        self.drawn.update({png_of(job.relative): None for job in jobs if job.png})

    def wait(self) -> dict[str, pd.DataFrame | None]:
        try:
            for future in self.futures:
                future.result()
        finally:
            if self.pool is not None:
                self.pool.shutdown(cancel_futures=True)
        for job in self.todo:
            path = self.project / job.relative
            self.cache.store_file(job.cache_name + ".svg", path)
            if job.png:
                self.cache.store_file(job.cache_name + ".png", path.with_suffix(".png"))
        return self.drawn


def draw_all(project: Path, jobs: list[Job], cache: Cache, workers: int = WORKERS) -> Drawing:
    """Start drawing every job into ``project`` (cached ones are copied); call ``wait()`` before
    using the files.

    With 2 workers the main process draws half of the work itself while one spawned process draws
    the other half; the caller can write pages in between, while the worker finishes.
    """
    todo = []
    for job in jobs:
        path = project / job.relative
        path.parent.mkdir(parents=True, exist_ok=True)
        names = [job.cache_name + ".svg"] + ([job.cache_name + ".png"] if job.png else [])
        hits = [h for h in map(cache.file, names) if h is not None]
        if len(hits) == len(names):
            shutil.copyfile(hits[0], path)
            if job.png:
                shutil.copyfile(hits[1], path.with_suffix(".png"))
        else:
            todo.append(job)
    tasks = _tasks(project, todo, workers)
    mine, theirs = tasks[0::2], tasks[1::2]  # alternate by cost: the worker also pays its start-up
    pool, futures = None, []
    if workers > 1 and theirs:
        import multiprocessing

        pool = ProcessPoolExecutor(1, mp_context=multiprocessing.get_context("spawn"))
        futures = [pool.submit(globals()[name], *args) for name, args in theirs]
    else:
        mine = tasks
    try:
        for name, args in mine:
            globals()[name](*args)
    except BaseException:
        if pool is not None:
            pool.shutdown(cancel_futures=True)
        raise
    return Drawing(project, jobs, todo, cache, pool, futures)


def _cost(task: tuple) -> float:
    name, args = task
    if name == "draw_positions":
        return 0.05 * len(args[1])
    return 0.5 + 0.015 * len(args[1])  # a chart's cost grows with its rows


def _tasks(project: Path, jobs: list[Job], workers: int) -> list[tuple]:
    """(function name, arguments) per task, costliest first; unit strips in chunks that share one
    frame."""
    strips = [j for j in jobs if j.draw == "draw_position"]
    tasks: list[tuple[str, tuple]] = [
        ("_run", (j.draw, j.data, j.args, str(project / j.relative), j.png))
        for j in jobs
        if j.draw != "draw_position"
    ]
    chunks = 2 * workers if len(strips) > 40 else 1
    tasks += [
        ("draw_positions", (_frame_of(strips), [(str(project / j.relative), j.data) for j in part]))
        for part in (strips[i::chunks] for i in range(chunks))
        if part
    ]
    return sorted(tasks, key=_cost, reverse=True)


def _frame_of(strips: list[Job]) -> pd.DataFrame | None:
    return strips[0].args[0] if strips else None


# --- measure figures -------------------------------------------------------------------------


def axis(result: MeasureResult) -> tuple[float, str]:
    """(multiplier, axis label) for a measure's adjusted values: percent for rates, the outcome's
    unit otherwise."""
    if result.measure.type == "continuous":
        return 1.0, f"Adjusted mean, {result.measure.unit_label}"
    return 100.0, "Risk-standardised rate, %"


def measure_figure_data(result: MeasureResult) -> pd.DataFrame:
    """What the interval chart shows: reported units, lowest adjusted value first."""
    t = result.table[result.table["status"] == "reported"].sort_values(["rsr_median", "unit_name"])
    k = axis(result)[0]
    return pd.DataFrame(
        {
            "unit_name": t["unit_name"],
            "rsr": t["rsr_median"] * k,
            "lo": t["rsr_lower"] * k,
            "hi": t["rsr_upper"] * k,
            "group": t["group"],
        }
    ).reset_index(drop=True)


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


def movement_figure_data(result: MeasureResult) -> pd.DataFrame:
    """Each reported unit's raw and adjusted value, fewest cases first (small units move most)."""
    t = result.table[
        (result.table["status"] == "reported") & result.table["raw_rate"].notna()
    ].sort_values(["cases", "unit_name"])
    k = axis(result)[0]
    return pd.DataFrame(
        {
            "unit_name": t["unit_name"],
            "cases": t["cases"].astype(int),
            "raw": t["raw_rate"] * k,
            "adjusted": t["rsr_median"] * k,
            "group": t["group"],
        }
    ).reset_index(drop=True)


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


def position_frame(results: list[MeasureResult]) -> pd.DataFrame:
    """The part of every unit strip that is the same for all units: per measure, where most units
    sit.

    Ratios to the benchmark: the benchmark itself (1, benchmark.py), and the 10th-90th percentile
    band of the reported units' adjusted ratios.
    """
    rows = []
    for r in results:
        t = r.table[r.table["status"] == "reported"]
        lo, hi = np.quantile(t["ratio_median"], [0.1, 0.9]) if len(t) else (np.nan, np.nan)
        rows.append(
            {
                "measure": r.measure.name,
                "bench": 1.0,
                "band_lo": lo,
                "band_hi": hi,
                "x_min": float(t["ratio_lower"].min()) if len(t) else 0.8,
                "x_max": float(t["ratio_upper"].max()) if len(t) else 1.25,
            }
        )
    return pd.DataFrame(rows)


def position_data(unit_id: str, results: list[MeasureResult]) -> pd.DataFrame | None:
    """A unit's adjusted ratio to the benchmark on every measure (NaN where not reported); None if
    none reported."""
    rows = []
    for r in results:
        row = r.table[r.table["unit_id"] == unit_id]
        reported = len(row) and row["status"].iloc[0] == "reported"
        rows.append(
            {
                "measure": r.measure.name,
                "ratio": row["ratio_median"].iloc[0] if reported else np.nan,
                "lo": row["ratio_lower"].iloc[0] if reported else np.nan,
                "hi": row["ratio_upper"].iloc[0] if reported else np.nan,
                "group": row["group"].iloc[0] if reported else "",
            }
        )
    data = pd.DataFrame(rows)
    return None if data["ratio"].isna().all() else data


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
    from matplotlib.lines import Line2D
    from matplotlib.transforms import blended_transform_factory

    measures = list(frame["measure"])
    rows = np.arange(len(measures))[::-1].astype(float)  # first measure on top
    f = frame.assign(
        row=rows, bottom=rows - 0.36, top=rows + 0.36, b_lo=rows - 0.45, b_hi=rows + 0.45
    )
    lo, hi = _x_limits(frame)
    plot = (
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
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fig = plot.draw()
    # Let plotnine's layout engine place everything once, then drop the engine: with an engine,
    # matplotlib draws the whole figure twice per save. (set_layout_engine(None) refuses to drop an
    # engine whose colour-bar settings differ, hence the attribute.)
    fig.canvas.draw()
    fig.savefig(io.BytesIO(), format="svg")
    fig._layout_engine = None  # type: ignore[attr-defined]
    ax = fig.axes[0]
    at_right = blended_transform_factory(ax.transAxes, ax.transData)
    marks = []
    for row in rows:
        line = Line2D([], [], linewidth=2.4)
        point = Line2D(
            [], [], linestyle="none", markersize=8, markerfacecolor="white", markeredgewidth=1.8
        )
        ax.add_line(line)
        ax.add_line(point)
        marks.append(
            (
                line,
                point,
                ax.text(
                    0.99,
                    row,
                    "",
                    transform=at_right,
                    ha="right",
                    va="center",
                    fontsize=8.5,
                    color=BENCHMARK_INK,
                ),
                row,
            )
        )
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


def trend_data(
    unit_id: str, results: list[MeasureResult], past, period: str = "this cycle"
) -> pd.DataFrame | None:
    """A unit's published adjusted values in each kept cycle and now (scaled like the measure
    charts)."""
    rows = []
    for r in results:
        k = axis(r)[0]
        cycles = [(p.period, p.table[p.table["measure"] == r.measure.key]) for p in past] + [
            (None, r.table)
        ]
        for i, (label, table) in enumerate(cycles):
            row = table[(table["unit_id"] == unit_id) & (table["status"] == "reported")]
            if len(row):
                rows.append(
                    {
                        "measure": r.measure.name,
                        "order": i,
                        "period": label or period,
                        "value": row["rsr_median"].iloc[0] * k,
                        "lo": row["rsr_lower"].iloc[0] * k,
                        "hi": row["rsr_upper"].iloc[0] * k,
                    }
                )
    data = pd.DataFrame(rows)
    if data.empty or data.groupby("measure")["order"].nunique().max() < 2:
        return None  # a trend needs at least two cycles
    return data


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


def model_figure_path(measure_key: str, kind: str) -> str:
    return f"figures/model-{measure_key}-{kind}.svg"


def roc_figure_data(result: MeasureResult) -> pd.DataFrame:
    """ROC curves, in-sample and cross-validated, one row per point."""
    v = result.model_validation
    curves = [("In sample", v.in_sample)]
    if v.cross_validated is not None:
        curves.append((f"Cross-validated ({v.folds} folds)", v.cross_validated))
    parts = []
    for fit, metrics in curves:
        if metrics.roc is None:
            raise ValueError(f"{result.measure.key}: ROC curves are for binary outcomes only")
        parts.append(metrics.roc.assign(fit=fit))
    return pd.concat(parts, ignore_index=True)


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


def calibration_figure_data(result: MeasureResult) -> pd.DataFrame:
    """Observed against expected mean per risk group, in-sample and cross-validated (percent for
    rates)."""
    v = result.model_validation
    k = 100.0 if v.binary else 1.0
    parts = [("In sample", v.in_sample)] + (
        [(f"Cross-validated ({v.folds} folds)", v.cross_validated)] if v.cross_validated else []
    )
    return pd.concat(
        [
            pd.DataFrame(
                {
                    "group": m.groups["group"],
                    "expected": m.groups["expected_mean"] * k,
                    "observed": m.groups["observed_mean"] * k,
                    "fit": name,
                }
            )
            for name, m in parts
        ],
        ignore_index=True,
    )


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


# --- what to draw ----------------------------------------------------------------------------


def plan(
    results: list[MeasureResult],
    unit_ids,
    slugs: dict[str, str],
    past,
    funnels: dict,
    period: str = "this cycle",
) -> list[Job]:
    """Every figure of the site as a drawing job (measure charts with PNG beside, unit strips, model
    plots)."""
    jobs: list[Job] = []
    for r in results:
        scale, label = axis(r)
        key_ = r.measure.key
        data = measure_figure_data(r)
        if len(data):
            # PNG copies for slides and documents; above PNG_MAX_UNITS rows the tall PNG costs more
            # than it helps
            jobs.append(
                Job(
                    measure_figure_path(key_, "intervals"),
                    "draw_intervals",
                    data,
                    (r.benchmark * scale, label),
                    png=len(data) <= PNG_MAX_UNITS,
                )
            )
            jobs.append(
                Job(
                    measure_figure_path(key_, "movement"),
                    "draw_movement",
                    movement_figure_data(r),
                    (r.benchmark * scale, label),
                )
            )
        f = funnels.get(key_)
        if f is not None:
            points, curves = f.scaled(scale)
            jobs.append(
                Job(
                    measure_figure_path(key_, "funnel"),
                    "draw_funnel",
                    points,
                    (curves, f.benchmark * scale, label),
                    png=True,
                )
            )
        if r.validation is not None:
            jobs.append(
                Job(
                    model_figure_path(key_, "calibration"),
                    "draw_calibration",
                    calibration_figure_data(r),
                    ("%" if r.validation.binary else r.measure.unit_label,),
                )
            )
            if r.validation.binary:
                jobs.append(Job(model_figure_path(key_, "roc"), "draw_roc", roc_figure_data(r)))
    frame = position_frame(results)
    frame_text = frame.to_csv()  # shared by every strip: turned into text once
    for uid in unit_ids:
        data = position_data(uid, results)
        if data is not None:
            jobs.append(
                Job(
                    unit_figure_path(slugs[uid], "position"),
                    "draw_position",
                    data,
                    (frame,),
                    args_text=frame_text,
                )
            )
        if past:
            trend = trend_data(uid, results, past, period)
            if trend is not None:
                jobs.append(Job(unit_figure_path(slugs[uid], "trend"), "draw_trend", trend))
    return jobs
