"""Pages: Quarto markdown (.qmd) and ``_quarto.yml`` from Jinja2 templates.

Every number is formatted here, in Python, and handed to a template in a typed context; templates
only lay values out. Text that comes from data passes through the ``markdown_literal`` filter, which
makes it literal in both Quarto (pandoc) and the built-in renderer.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import PurePosixPath

import jinja2
import pandas as pd

from pipeline import templates_path
from pipeline.config import CycleConfig
from pipeline.history import CLEAR_FALL, CLEAR_RISE, PastCycle
from pipeline.results import FIT_SETTINGS, GROUPS, POSITION, MeasureResult
from pipeline.website.contexts import (
    ChangesPage,
    MeasurePage,
    ModelPage,
    PlainPage,
    ProjectFile,
    SiteContext,
    UnitPage,
)
from pipeline.website.funnel import MEASURED_COVERAGE, Funnel
from pipeline.website.history_views import change_views, trends
from pipeline.website.markup import attribute_literal, code_span, markdown_literal, times_words
from pipeline.website.model_page import model_view
from pipeline.website.sentences import GROUP_SYMBOLS, SYMBOLS
from pipeline.website.views import MeasureView, UnitView, build_views


def environment() -> jinja2.Environment:
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(templates_path()),
        undefined=jinja2.StrictUndefined,
        # output is markdown; data text is escaped by the markdown_literal filter instead
        autoescape=False,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )
    env.filters["markdown_literal"] = markdown_literal
    env.filters["code_span"] = code_span
    env.filters["attribute_literal"] = attribute_literal
    # a JSON string is a YAML scalar
    env.filters["yaml"] = lambda s: json.dumps(str(s), ensure_ascii=False)
    return env


@dataclass(frozen=True)
class Page:
    path: str  # relative to the Quarto project, posix
    text: str


def _up(path: str) -> str:
    return "../" * (len(PurePosixPath(path).parts) - 1)


def _site_context(
    config: CycleConfig, site: dict, measures: list[MeasureView], unit_views: list[UnitView]
) -> SiteContext:
    """What every page template is given: the cycle, the site, every measure and unit."""
    return SiteContext(
        cycle=config.cycle,
        site=site,
        measures=measures,
        units=unit_views,
        limits=FIT_SETTINGS.sampler_checks,
        priors=FIT_SETTINGS.priors,
        reporting=config.reporting,
        sampler=config.sampler,
        validation=config.validation,
        level=f"{config.reporting.interval * 100:g}%",
        positions=POSITION,
        symbols=SYMBOLS,
        groups=GROUPS,
        group_symbols=GROUP_SYMBOLS,
        k_hat_max=FIT_SETTINGS.k_hat_max,
        fit=FIT_SETTINGS,
        unit_count=len(unit_views),
        funnel_coverage=MEASURED_COVERAGE,
        retry_warmup=times_words(FIT_SETTINGS.retry_tune_factor),
        prior_scales=" and ".join(times_words(s) for s in FIT_SETTINGS.prior_scales) + " as wide",
    )


def render_pages(
    config: CycleConfig,
    results: list[MeasureResult],
    units: pd.DataFrame,
    addresses: dict[str, str],
    drawn: dict,
    past: list[PastCycle],
    site: dict,
    funnels: dict[str, Funnel | None] | None = None,
) -> list[Page]:
    """All pages of the site plus ``_quarto.yml``, as text."""
    env = environment()
    measures, unit_views = build_views(config, results, units, addresses, drawn, funnels)
    unit_trends = trends(config, results, past, addresses)
    common = vars(_site_context(config, site, measures, unit_views))
    pages: list[tuple[str, str, object]] = [
        ("index.qmd", "index.qmd.j2", PlainPage()),
        ("units.qmd", "units.qmd.j2", PlainPage()),
        ("guide.qmd", "guide.qmd.j2", PlainPage()),
        *[(m.href, "measure.qmd.j2", MeasurePage(m)) for m in measures],
        *[
            (u.href, "unit.qmd.j2", UnitPage(u, unit_trends[uid] if past else []))
            for uid, u in zip(units.index, unit_views, strict=True)
        ],
        (
            "changes.qmd",
            "changes.qmd.j2",
            ChangesPage(
                previous=markdown_literal(past[-1].period) if past else "",
                rise=f"{CLEAR_RISE * 100:g}%",
                fall=f"{CLEAR_FALL * 100:g}%",
                blocks=change_views(results, past[-1] if past else None, addresses),
            ),
        ),
        *[
            (f"models/{m.measure.key}.qmd", "model.qmd.j2", ModelPage(model_view(m, drawn)))
            for m in results
        ],
        ("methods.qmd", "methods.qmd.j2", PlainPage()),
        ("cautions.qmd", "cautions.qmd.j2", PlainPage()),
        ("downloads.qmd", "downloads.qmd.j2", PlainPage()),
    ]
    out = [
        Page(path, env.get_template(f"qmd/{tpl}").render(**common, **vars(extra), up=_up(path)))
        for path, tpl, extra in pages
    ]
    out.append(
        Page(
            "_quarto.yml",
            env.get_template("qmd/_quarto.yml.j2").render(
                **common, **vars(ProjectFile([p for p, _, _ in pages])), up=""
            ),
        )
    )
    return out
