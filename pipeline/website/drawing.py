"""Drawing every figure of a site: the jobs, the figure cache and the worker process.

Every file is cached by the hash of its data and of the drawing code (``figures.py``). Drawing
jobs run in up to ``WORKERS`` processes: the main process draws its share while one spawned
process draws the rest, and the caller can write pages in between.
"""

from __future__ import annotations

import multiprocessing
import os
import shutil
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from pipeline.cache import Cache, cache_key
from pipeline.results import MeasureResult
from pipeline.website import figures
from pipeline.website.figure_data import (
    axis,
    calibration_figure_data,
    measure_figure_data,
    measure_figure_path,
    model_figure_path,
    movement_figure_data,
    png_of,
    position_data,
    position_frame,
    roc_figure_data,
    trend_data,
    unit_figure_path,
)
from pipeline.website.figures import DRAWING_CODE

WORKERS = max(1, min(2, os.cpu_count() or 1))


PNG_MAX_UNITS = 100


@dataclass
class Job:
    """One drawing: ``draw(*args, path, png)`` writes ``relative`` (and its PNG when ``png``)."""

    relative: str
    draw: str  # name of a draw function in figures.py (picklable for worker processes)
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
        self.cache_name = cache_key(
            "figure", self.draw, self.data.to_csv(), args, self.png, DRAWING_CODE
        )


def run_job(job_draw: str, data: pd.DataFrame, args: tuple, path: str, png: bool) -> None:
    """Draw one job: ``job_draw`` names a draw function of ``figures.py``."""
    getattr(figures, job_draw)(data, *args, Path(path), png)


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
        pool = ProcessPoolExecutor(1, mp_context=multiprocessing.get_context("spawn"))
        futures = [pool.submit(_TASKS[name], *args) for name, args in theirs]
    else:
        mine = tasks
    try:
        for name, args in mine:
            _TASKS[name](*args)
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
        ("run_job", (j.draw, j.data, j.args, str(project / j.relative), j.png))
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


def figure_jobs(
    results: list[MeasureResult],
    unit_ids,
    addresses: dict[str, str],
    past,
    funnels: dict,
    period: str = "this cycle",
) -> list[Job]:
    """Every figure of the site as a drawing job (measure charts with PNG beside, unit strips, model
    plots)."""
    jobs = [job for r in results for job in _measure_jobs(r, funnels.get(r.measure.key))]
    frame = position_frame(results)
    frame_text = frame.to_csv()  # shared by every strip: turned into text once
    for uid in unit_ids:
        data = position_data(uid, results)
        if data is not None:
            jobs.append(
                Job(
                    unit_figure_path(addresses[uid], "position"),
                    "draw_position",
                    data,
                    (frame,),
                    args_text=frame_text,
                )
            )
        if past:
            trend = trend_data(uid, results, past, period)
            if trend is not None:
                jobs.append(Job(unit_figure_path(addresses[uid], "trend"), "draw_trend", trend))
    return jobs


def _measure_jobs(r: MeasureResult, funnel) -> list[Job]:
    """A measure's charts (intervals and funnel with PNG copies, movement) and model plots."""
    jobs: list[Job] = []
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
    f = funnel
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
    return jobs


# the functions a task names (module-level, so a spawned worker can unpickle them)
_TASKS: dict[str, Callable[..., None]] = {
    "run_job": run_job,
    "draw_positions": figures.draw_positions,
}
