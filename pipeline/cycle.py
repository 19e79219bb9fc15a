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
from typing import Protocol

import numpy as np
import pandas as pd

from . import __version__, templates_path
from .benchmark import benchmark_offset, null_variance, reference_rate, scaled_totals
from .cache import Cache, code_version, key, library_versions
from .casemix import fit_with_design, unit_summary_fit, without_terms
from .config import CycleConfig, MeasureSection, family_of
from .data import Cohort, load_cohort
from .errors import RenderError, StrictError
from .figures import (
    MAX_FIGURE_UNITS,
    draw_all,
    plan,
)
from .funnel import for_measure
from .history import PastCycle, kept_addresses, past_cycles, record_cycle
from .pages import render_pages, unit_slugs
from .render import Renderer, choose_renderer, render_site
from .results import (
    DICTIONARY,
    MeasureFits,
    MeasureResult,
    PriorAlternative,
    public_table,
    results_json,
    summarise_measure,
)
from .sampling import K_HAT_MAX, SENSITIVITY_SCALES, Sampler, reweight_tau, with_tau_scale
from .shrinkage import PREDICTOR_PRIOR, Cells, ShrinkageSpec, thin, unit_draws
from .targets import design as target_design
from .validation import validate

# every site's provenance; only folders holding it are ever replaced
MARKER = "fairgauge-manifest.json"


class Reporter(Protocol):
    def stage(self, text: str) -> None: ...
    def warn(self, text: str) -> None: ...


class SilentReporter:
    """Reports nothing (library use and tests)."""

    def stage(self, text: str) -> None:
        pass

    def warn(self, text: str) -> None:
        pass


SILENT = SilentReporter()


@dataclass
class CycleSummary:
    site: Path
    units: int
    measures: list[str]
    patients: int
    renderer: Renderer
    results: list[MeasureResult]
    warnings: list[str] = field(default_factory=list)
    seconds: float = 0.0


def run_cycle(
    config: CycleConfig,
    reporter: Reporter = SILENT,
    strict: bool = False,
    renderer: str | None = None,
    no_cache: bool = False,
) -> CycleSummary:
    """Run one reporting cycle described by ``config`` and publish its site."""
    start = time.perf_counter()
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
    manifest = about(config, cohort, chosen, results)
    table = public_table(results)
    slugs = unit_slugs(cohort.units.index, kept_addresses(past))
    build = build_site(
        config, cohort, results, table, manifest, past, chosen, cache, reporter, figures, slugs
    )
    publish(build, config.cycle.output)
    reporter.stage(f"recording this cycle in {config.cycle.history}")
    record_cycle(config.cycle.history, config.cycle.period, table, results, manifest, slugs)
    return CycleSummary(
        site=config.cycle.output,
        units=len(cohort.units),
        measures=[m.key for m in config.measures],
        patients=len(cohort.rows),
        renderer=chosen,
        results=results,
        warnings=warnings,
        seconds=time.perf_counter() - start,
    )


def fit_measures(
    config: CycleConfig, cohort: Cohort, cache: Cache, reporter: Reporter
) -> list[MeasureResult]:
    """Case-mix fit, validation and shrinkage fit for every measure (one compiled model per
    likelihood)."""
    rows = cohort.rows
    present = set(rows[cohort.unit_column]) | {
        u for t in (cohort.summaries or {}).values() if t is not None for u in t.index
    }
    fitted_units = [u for u in cohort.units.index if u in present]
    codes = pd.Categorical(rows[cohort.unit_column], categories=fitted_units).codes.astype(np.int64)
    samplers: dict[str, Sampler] = {}
    results = []
    code = code_version()
    for i, measure in enumerate(config.measures):
        seed = config.sampler.seed + i
        settings = (
            measure.type,
            measure.outcome,
            measure.casemix,
            family_of(measure),
            measure.missing,
            measure.expected_column,
            measure.summary,
            measure.social_risk,
            measure.risk_threshold,
            config.reporting.benchmark,
            tuple(measure.pull_towards),
        )
        fit_key = key(
            "fit",
            code,
            cohort.sha256,
            cohort.unit_column,
            fitted_units,
            settings,
            config.sampler,
            config.validation,
            seed,
            ShrinkageSpec(),
            PREDICTOR_PRIOR,
        )
        fits = cache.load(fit_key)
        if fits is None:
            fits = fit_measure(
                config, cohort, measure, codes, fitted_units, samplers, seed, reporter
            )
            cache.store(fit_key, fits)
        else:
            reporter.stage(
                f"{measure.key}: data and model settings unchanged; reusing the cached fits"
            )
        for note in fits.casemix.warnings:
            reporter.warn(note)
        results.append(summarise_measure(config, measure, cohort.units, fitted_units, fits))
    return results


def fit_measure(
    config: CycleConfig,
    cohort: Cohort,
    measure: MeasureSection,
    codes: np.ndarray,
    fitted_units: list[str],
    samplers: dict[str, Sampler],
    seed: int,
    reporter: Reporter,
    casemix_formula: str | None = None,
) -> MeasureFits:
    """Case-mix fit, its validation and the shrinkage fit of one measure (and, with social risk, the
    refit without it)."""
    n_units = len(fitted_units)
    validation, scale = None, 1.0
    if measure.summary:
        reporter.stage(f"{measure.key}: unit-level input; no case-mix fit")
        summary = cohort.unit_totals(measure.key)
        position_of = {u: i for i, u in enumerate(fitted_units)}
        unit_codes = np.array([position_of[u] for u in summary.index], dtype=np.int64)
        casemix = unit_summary_fit(measure, summary)
        rate = reference_rate(
            config.reporting.benchmark, measure.type, casemix.events / casemix.patients
        )
        expected, _ = scaled_totals(summary["expected"].to_numpy(), rate * casemix.patients)
        cells, likelihood = (
            Cells.from_units(unit_codes, summary["observed"], expected, n_units),
            "poisson",
        )
        counts = pd.DataFrame(
            {
                "cases": summary["cases"].to_numpy(),
                "observed": summary["observed"].to_numpy(),
                "expected": expected,
                "variance": expected,
            },
            index=unit_codes,
        ).reindex(range(n_units))
    else:
        reporter.stage(f"{measure.key}: case-mix fit ({casemix_formula or measure.casemix})")
        casemix, x, y = fit_with_design(measure, cohort.rows, codes, casemix_formula)
        casemix.exclusions["by_unit"] = {
            fitted_units[c]: n for c, n in casemix.exclusions.get("by_unit", {}).items()
        }
        used_codes = codes[casemix.used]
        if casemix_formula is None:
            threshold = (
                casemix.events / casemix.patients
                if measure.risk_threshold == "network"
                else float(measure.risk_threshold)
            )
            v = config.validation
            reporter.stage(
                f"{measure.key}: validating the case-mix model ({v.folds}-fold cross-validation)"
            )
            validation = validate(
                casemix,
                measure.type == "binary",
                y,
                x,
                used_codes,
                v.folds,
                v.deciles,
                threshold,
                seed,
            )
        likelihood = {"binary": "binomial", "continuous": family_of(measure)}[measure.type]
        offset, expected, scale = benchmark_offset(
            config.reporting.benchmark, measure, casemix, y, used_codes
        )
        cells = (
            Cells.from_patients(used_codes, offset, y, n_units)
            if likelihood == "binomial"
            else Cells.from_continuous(used_codes, offset, y, n_units, likelihood)
        )
        counts = (
            pd.DataFrame(
                {
                    "code": used_codes,
                    "y": y,
                    "e": expected,
                    "v": null_variance(measure, casemix, y, expected),
                }
            )
            .groupby("code")
            .agg(
                cases=("y", "size"),
                observed=("y", "sum"),
                expected=("e", "sum"),
                variance=("v", "sum"),
            )
            .reindex(range(n_units))
        )
    design = None
    if measure.pull_towards:
        present = counts["cases"].fillna(0).to_numpy() > 0
        # case_mix: each unit's mean offset, its patients' average risk on the link scale (no
        # patients: unit totals)
        mean_risk = (
            None
            if measure.summary
            else pd.Series(offset)
            .groupby(used_codes)
            .mean()
            .reindex(range(n_units))
            .to_numpy(float)
        )
        design = target_design(
            tuple(measure.pull_towards),
            fitted_units,
            present,
            counts["cases"].fillna(0).to_numpy(float),
            mean_risk,
            cohort.units["kind"],
            cohort.attributes,
        )
    plain_cells = cells
    cells = cells.with_predictors(design.w if design is not None else None)
    sampler = _sampler(samplers, likelihood, design, config)
    s = config.sampler
    terms = (
        f" with {len(design.columns)} predictor term(s) of what units are pulled towards"
        if design is not None
        else ""
    )
    reporter.stage(
        f"{measure.key}: shrinkage fit ({likelihood}{terms}) on {len(cells.n):,} cells "
        f"({s.chains} chains x {s.draws} draws, {s.engine})"
    )
    draws, diagnostics = sampler.run_checked(cells, seed, measure.key, reporter.warn)
    reporter.stage(
        f"{measure.key}: sampled in {diagnostics.seconds:.1f} s; R-hat max "
        f"{diagnostics.rhat_max:.3f}, "
        f"bulk ESS min {diagnostics.ess_bulk_min:.0f}, divergences {diagnostics.divergences}"
    )
    sensitivity = (
        prior_sensitivity(
            config, sampler, samplers, cells, draws, seed, likelihood, reporter, measure.key
        )
        if casemix_formula is None
        else ()
    )
    without = None
    if measure.social_risk and casemix_formula is None:
        reduced = without_terms(measure.casemix, measure.social_risk)
        reporter.stage(
            f"{measure.key}: equity sensitivity: refitting without {', '.join(measure.social_risk)}"
        )
        without = fit_measure(
            config,
            cohort,
            measure,
            codes,
            fitted_units,
            samplers,
            seed,
            reporter,
            casemix_formula=reduced,
        )
    ratio_draws = unit_draws(cells, draws, likelihood=likelihood, scale=scale)
    plain = None
    if design is not None and casemix_formula is None:
        reporter.stage(
            f"{measure.key}: sensitivity: refitting with every unit pulled towards one typical unit"
        )
        plain_draws, plain_diagnostics = _sampler(samplers, likelihood, None, config).run_checked(
            plain_cells, seed, measure.key, reporter.warn
        )
        plain = MeasureFits(
            counts,
            casemix,
            unit_draws(plain_cells, plain_draws, likelihood=likelihood, scale=scale),
            plain_draws["tau"],
            plain_diagnostics,
            validation,
        )
    return MeasureFits(
        counts,
        casemix,
        ratio_draws,
        draws["tau"],
        diagnostics,
        validation,
        without,
        sensitivity,
        design=design,
        beta=draws.get("beta"),
        without_predictors=plain,
    )


def _sampler(samplers: dict, likelihood: str, design, config: CycleConfig) -> Sampler:
    """One sampler (one compiled model) per likelihood and number of predictor terms."""
    p = 0 if design is None else len(design.columns)
    name = likelihood if p == 0 else f"{likelihood}-predictors{p}"
    if name not in samplers:
        samplers[name] = Sampler(
            ShrinkageSpec(likelihood=likelihood, predictors=p),
            config.sampler,
            engine=config.sampler.engine,
        )
    return samplers[name]


def prior_sensitivity(
    config,
    sampler: Sampler,
    samplers: dict,
    cells: Cells,
    draws: dict,
    seed: int,
    likelihood: str,
    reporter: Reporter,
    key: str,
) -> tuple:
    """The posterior under a narrower and a wider tau prior: reweighted draws, or a refit when the
    weights are unreliable."""
    out = []
    tau = draws["tau"][thin(len(draws["tau"]), 4000)]  # the draws unit_draws keeps
    base = sampler.spec.priors["tau"][1]["sigma"]
    for scale in SENSITIVITY_SCALES:
        log_weights, k_hat = reweight_tau(tau, scale * base, base)
        if k_hat <= K_HAT_MAX:
            out.append(PriorAlternative(scale * base, k_hat, "reweighted", log_weights, None))
            continue
        reporter.stage(
            f"{key}: prior sensitivity: importance weights unreliable (k-hat {k_hat:.2f}); "
            f"refitting with tau ~ HalfNormal({scale * base:g})"
        )
        name = f"{likelihood}-predictors{sampler.spec.predictors}-tau{scale}"
        if name not in samplers:
            samplers[name] = Sampler(
                with_tau_scale(sampler.spec, scale * base),
                config.sampler,
                engine=config.sampler.engine,
            )
        refit, _ = samplers[name].run_checked(cells, seed, key, reporter.warn)
        out.append(
            PriorAlternative(
                scale * base,
                k_hat,
                "refitted",
                None,
                unit_draws(cells, refit, likelihood=likelihood),
            )
        )
    return tuple(out)


def about(
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
    slugs: dict[str, str] | None = None,
) -> Path:
    """Write figures, downloads and pages into a new folder beside the output; render it there."""
    output = config.cycle.output
    try:
        output.parent.mkdir(parents=True, exist_ok=True)
        remove_stale_builds(output)
        build = Path(
            tempfile.mkdtemp(prefix=f".{output.name}.tmp-{os.getpid()}-", dir=output.parent)
        )
    except OSError as exc:
        raise RenderError(
            f"cannot write beside the output folder {output} ({exc.strerror or exc}); the "
            "previous site was left as it was."
        ) from None
    drawing = None
    try:
        project = build / "_source"
        project.mkdir()
        slugs = slugs or unit_slugs(cohort.units.index, kept_addresses(past))
        funnels = {
            r.measure.key: for_measure(r, config.reporting.funnel_overdispersion) for r in results
        }
        # figure path (relative to the project) -> the data drawn, once drawing is done
        drawn: dict = {}
        if figures:
            jobs = plan(results, cohort.units.index, slugs, past, funnels, config.cycle.period)
            reporter.stage(
                f"drawing {len(jobs)} figures ({len(results)} measures, {len(cohort.units)} units)"
            )
            # a worker may still be drawing while the pages are written
            drawing = draw_all(project, jobs, cache)
            drawn = drawing.drawn
        reporter.stage("writing results and pages")
        (project / MARKER).write_text(json.dumps(manifest, indent=2), encoding="utf-8")
        (project / "downloads").mkdir(parents=True)
        table.to_csv(project / "downloads" / "results.csv", index=False, float_format="%.6g")
        (project / "downloads" / "results.json").write_text(
            results_json(table, results, manifest), encoding="utf-8"
        )
        (project / "assets").mkdir()
        for asset in ("fairgauge.css", "fairgauge.js", "favicon.svg"):
            shutil.copyfile(templates_path() / "static" / asset, project / "assets" / asset)
        for page in render_pages(
            config,
            results,
            cohort.units,
            slugs,
            drawn,
            past,
            {**manifest, "dictionary": DICTIONARY},
            funnels,
        ):
            target = project / page.path
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_text(page.text, encoding="utf-8")
        if drawing is not None:
            waiting = drawing
            drawing = None
            waiting.wait()
        reporter.stage(f"rendering the site ({renderer.name})")
        render_site(project, build, renderer)
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


def publish(build: Path, output: Path) -> None:
    """Swap the finished ``build`` in place of ``output``; refuse to replace a folder we did not
    make."""
    if output.exists() and any(output.iterdir()) and not (output / MARKER).exists():
        shutil.rmtree(build, ignore_errors=True)
        raise RenderError(
            f"{output} already exists, is not empty and was not made by fairgauge, so it was "
            "left alone. "
            "Choose an empty or new folder for [cycle].output."
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
