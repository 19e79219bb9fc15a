"""One reporting cycle, start to finish: read, fit, summarise, draw, write, render, publish.

``run_cycle`` is the whole cycle on one screen; each stage is one named call. Nothing is
written to the output folder until every stage has succeeded: the site is built in a
temporary folder beside it and swapped in at the end, so a failed cycle leaves the last
good site exactly as it was.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import tempfile
import time
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import pandas as pd

from pipeline import __version__, templates_path
from pipeline.cache import Cache, library_versions
from pipeline.config import CycleConfig
from pipeline.downloads import DICTIONARY, public_table, results_json
from pipeline.errors import RenderError, ReviewError, StrictError
from pipeline.fitting import fit_measures
from pipeline.history import PastCycle, kept_addresses, past_cycles, record_cycle
from pipeline.inputs.data import Cohort, load_cohort
from pipeline.progress import SILENT, Reporter
from pipeline.results import MeasureResult
from pipeline.website.addresses import unit_addresses
from pipeline.website.drawing import draw_all, figure_jobs
from pipeline.website.figures import MAX_FIGURE_UNITS
from pipeline.website.funnel import measure_funnel
from pipeline.website.pages import render_pages
from pipeline.website.render import SIGNOFF, Renderer, choose_renderer, render_site

# every site's provenance; only folders holding it are ever replaced
MARKER = "fairgauge-manifest.json"


@dataclass
class CycleRun:
    site: Path
    units: int
    measures: list[str]
    patients: int
    renderer: Renderer
    results: list[MeasureResult]
    warnings: list[str] = field(default_factory=list)
    seconds: float = 0.0


@dataclass
class BuiltCycle:
    """A cycle fitted and rendered into a new folder, not yet published anywhere."""

    build: Path  # the rendered site, in a folder beside where it will go
    config: CycleConfig
    cohort: Cohort
    results: list[MeasureResult]
    table: pd.DataFrame  # the public results table
    manifest: dict
    addresses: dict[str, str]
    renderer: Renderer
    warnings: list[str]
    past: list[PastCycle]

    def run(self, site: Path, seconds: float) -> CycleRun:
        return CycleRun(
            site=site,
            units=len(self.cohort.units),
            measures=[m.key for m in self.config.measures],
            patients=len(self.cohort.rows),
            renderer=self.renderer,
            results=self.results,
            warnings=self.warnings,
            seconds=seconds,
        )


def run_cycle(
    config: CycleConfig,
    reporter: Reporter = SILENT,
    strict: bool = False,
    renderer: str | None = None,
    no_cache: bool = False,
) -> CycleRun:
    """Run one reporting cycle described by ``config`` and publish its site."""
    start = time.perf_counter()
    if config.review.required:
        raise ReviewError(
            "[review].required is true, so this cycle cannot be published directly. Run "
            "`fairgauge stage`, then `fairgauge sign-off` and `fairgauge promote`."
        )
    built = build_cycle(config, config.cycle.output, reporter, strict, renderer, no_cache)
    publish(built.build, config.cycle.output)
    reporter.stage(f"recording this cycle in {config.cycle.history}")
    record_cycle(
        config.cycle.history,
        config.cycle.period,
        built.table,
        built.results,
        built.manifest,
        built.addresses,
    )
    return built.run(config.cycle.output, time.perf_counter() - start)


def build_cycle(
    config: CycleConfig,
    beside: Path,
    reporter: Reporter = SILENT,
    strict: bool = False,
    renderer: str | None = None,
    no_cache: bool = False,
    staged: bool = False,
) -> BuiltCycle:
    """Read, check, fit and render the cycle into a new folder beside ``beside``; publish
    nothing. ``staged``: the build is for review before publication (the manifest says so)."""
    chosen = choose_renderer(renderer or config.cycle.renderer)
    reporter.stage(f"renderer: {chosen.name} ({chosen.reason})")
    reporter.stage("reading and checking the cohort and the unit table")
    cohort = load_cohort(config)
    warnings = list(cohort.warnings)
    figures = len(cohort.units) <= MAX_FIGURE_UNITS
    if not figures:
        warnings.append(
            f"{len(cohort.units):,} units: figures are drawn for networks of up to "
            f"{MAX_FIGURE_UNITS} units; "
            "this site shows its results in tables only."
        )
    for w in warnings:
        reporter.warn(w)
    if strict and warnings:
        raise StrictError(
            f"{len(warnings)} warning(s) and --strict is set; nothing was fitted or published."
        )
    cache = Cache(None if no_cache else config.cycle.cache)
    results = fit_measures(config, cohort, cache, reporter)
    past = past_cycles(config.cycle.history, config.cycle.period)
    manifest = build_manifest(config, cohort, chosen, results)
    if staged:
        manifest["review"] = {
            "staged": manifest["built"],
            "methods_note": config.review.methods_note,
        }
    table = public_table(results)
    addresses = unit_addresses(cohort.units.index, kept_addresses(past))
    build = build_site(
        config,
        cohort,
        results,
        table,
        manifest,
        past,
        chosen,
        cache,
        reporter,
        figures,
        addresses,
        beside,
    )
    return BuiltCycle(
        build, config, cohort, results, table, manifest, addresses, chosen, warnings, past
    )


def build_manifest(
    config: CycleConfig, cohort: Cohort, renderer: Renderer, results: list[MeasureResult]
) -> dict:
    """The manifest: what this build is and how it was made (site root, results.json, methods
    page)."""
    # server, database, query and rows hashes; never credentials
    database = {"database": cohort.provenance} if cohort.provenance else {}
    return {
        **database,
        "title": config.cycle.title,
        "publisher": config.cycle.publisher,
        "period": config.cycle.period,
        "invented_data": config.cycle.invented_data,
        "version": __version__,
        "built": datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC"),
        "config_sha256": config.sha256,
        "input_sha256": cohort.sha256,
        "seed": config.sampler.seed,
        "renderer": f"{renderer.name} {renderer.version}",
        "versions": {k: v for k, v in library_versions().items() if k != "fairgauge"},
        "sampler": {
            k: getattr(config.sampler, k)
            for k in ("engine", "chains", "draws", "tune", "target_accept")
        },
        "diagnostics": {
            r.measure.key: {
                "rhat_max": round(r.diagnostics.rhat_max, 4),
                "ess_bulk_min": round(r.diagnostics.ess_bulk_min),
                "divergences": r.diagnostics.divergences,
            }
            for r in results
        },
    }


def build_site(
    config: CycleConfig,
    cohort: Cohort,
    results: list[MeasureResult],
    table: pd.DataFrame,
    manifest: dict,
    past: list[PastCycle],
    renderer: Renderer,
    cache: Cache,
    reporter: Reporter,
    figures: bool = True,
    addresses: dict[str, str] | None = None,
    beside: Path | None = None,
) -> Path:
    """Write figures, downloads and pages into a new folder beside ``beside`` (the output by
    default); render it there."""
    build = new_build_folder(beside or config.cycle.output)
    drawing = None
    try:
        project = build / "_source"
        project.mkdir()
        addresses = addresses or unit_addresses(cohort.units.index, kept_addresses(past))
        widen = config.reporting.funnel_overdispersion
        funnels = {r.measure.key: measure_funnel(r, widen) for r in results}
        if figures:
            jobs = figure_jobs(
                results, cohort.units.index, addresses, past, funnels, config.cycle.period
            )
            reporter.stage(
                f"drawing {len(jobs)} figures ({len(results)} measures, {len(cohort.units)} units)"
            )
            # a worker may still be drawing while the pages are written
            drawing = draw_all(project, jobs, cache)
        # figure path (relative to the project) -> the data drawn, once drawing is done
        drawn: dict = drawing.drawn if drawing is not None else {}
        reporter.stage("writing results and pages")
        _write_downloads(project, table, results, manifest)
        site = {**manifest, "dictionary": DICTIONARY}
        pages = render_pages(config, results, cohort.units, addresses, drawn, past, site, funnels)
        _write_pages(project, pages, staged="review" in manifest)
        if drawing is not None:
            waiting = drawing
            drawing = None
            waiting.wait()
        reporter.stage(f"rendering the site ({renderer.name})")
        render_site(project, build, renderer)
        (project / SIGNOFF).unlink(missing_ok=True)  # the rendered site's copy is the one
        return build
    except OSError as exc:
        _stop(drawing)
        shutil.rmtree(build, ignore_errors=True)
        raise RenderError(
            f"writing the new site failed ({exc.strerror or exc}: {exc.filename or build}); "
            "the previous site was left as it was."
        ) from None
    except BaseException:
        _stop(drawing)
        shutil.rmtree(build, ignore_errors=True)
        raise


def _write_pages(project: Path, pages, staged: bool) -> None:
    if staged:  # `fairgauge promote` writes the sign-off record in place of this placeholder
        placeholder = {"status": "staged for review, not signed off or published"}
        (project / SIGNOFF).write_text(json.dumps(placeholder, indent=2), encoding="utf-8")
    for page in pages:
        target = project / page.path
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_text(page.text, encoding="utf-8")


def new_build_folder(output: Path) -> Path:
    """A new, empty folder beside ``output`` for this build (stale ones of dead builds removed)."""
    try:
        output.parent.mkdir(parents=True, exist_ok=True)
        remove_stale_builds(output)
        return Path(
            tempfile.mkdtemp(prefix=f".{output.name}.tmp-{os.getpid()}-", dir=output.parent)
        )
    except OSError as exc:
        raise RenderError(
            f"cannot write beside the output folder {output} ({exc.strerror or exc}); the "
            "previous site was left as it was."
        ) from None


def _write_downloads(
    project: Path, table: pd.DataFrame, results: list[MeasureResult], manifest: dict
) -> None:
    """The manifest, the downloads (results.csv, results.json) and the static assets."""
    (project / MARKER).write_text(json.dumps(manifest, indent=2), encoding="utf-8")
    (project / "downloads").mkdir(parents=True)
    table.to_csv(project / "downloads" / "results.csv", index=False, float_format="%.6g")
    (project / "downloads" / "results.json").write_text(
        results_json(table, results, manifest), encoding="utf-8"
    )
    (project / "assets").mkdir()
    for asset in ("fairgauge.css", "fairgauge.js", "favicon.svg"):
        shutil.copyfile(templates_path() / "static" / asset, project / "assets" / asset)


def _stop(drawing) -> None:
    """Let a drawing worker finish or fail before its build folder is removed (its error is not the
    one to report)."""
    if drawing is not None:
        with contextlib.suppress(BaseException):
            drawing.wait()


def remove_stale_builds(output: Path) -> None:
    """Delete build or retired folders left by a cycle that was killed (its process is gone)."""
    for leftover in output.parent.glob(f".{output.name}.*-*"):
        kind, _, rest = leftover.name[len(output.name) + 2 :].partition("-")
        pid = rest.split("-")[0]
        if kind not in ("tmp", "old") or not pid.isdigit() or _alive(int(pid)):
            continue
        shutil.rmtree(leftover, ignore_errors=True)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def publish(
    build: Path, output: Path, marker: str = MARKER, setting: str = "[cycle].output"
) -> None:
    """Swap the finished ``build`` in place of ``output``; refuse to replace a folder we did not
    make (one without ``marker``; ``setting`` names the config key that chose ``output``)."""
    if output.exists() and any(output.iterdir()) and not (output / marker).exists():
        shutil.rmtree(build, ignore_errors=True)
        raise RenderError(
            f"{output} already exists, is not empty and was not made by fairgauge, so it was "
            "left alone. "
            f"Choose an empty or new folder for {setting}."
        )
    retired = None
    try:
        if output.exists():
            retired = output.with_name(f".{output.name}.old-{os.getpid()}")
            os.replace(output, retired)
        os.replace(build, output)
    except OSError as exc:
        if retired is not None and not output.exists():
            os.replace(retired, output)  # put the last good site back
        shutil.rmtree(build, ignore_errors=True)
        raise RenderError(
            f"could not swap the new site into {output} ({exc.strerror or exc}); the previous "
            "site was left as it was."
        ) from None
    if retired is not None:
        shutil.rmtree(retired, ignore_errors=True)
