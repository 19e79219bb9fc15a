"""The typed contexts of the page templates: what every page is given, and what each kind of page
adds. ``tests/test_pages.py`` checks that every name a template uses is a field here."""

from __future__ import annotations

from dataclasses import dataclass, field

from pipeline.config import CycleSection, ReportingSection, SamplerSection, ValidationSection
from pipeline.results import FitSettings
from pipeline.website.model_page import ModelView
from pipeline.website.views import MeasureView, UnitView


@dataclass(frozen=True)
class SiteContext:
    """What every page template is given: the cycle, the site, every measure and unit."""

    cycle: CycleSection
    site: dict  # the manifest, with the data dictionary
    measures: list[MeasureView]
    units: list[UnitView]
    limits: dict  # the convergence limits every fit must meet
    priors: list[str]
    reporting: ReportingSection
    sampler: SamplerSection
    validation: ValidationSection
    level: str  # the credible interval, "95%"
    positions: dict  # position key -> words
    symbols: dict  # position key -> mark
    groups: dict  # group key -> words
    group_symbols: dict  # group key -> mark
    k_hat_max: float
    fit: FitSettings
    unit_count: int
    funnel_coverage: str  # the funnel limits' measured coverage, in words
    retry_warmup: str  # the one retry's warm-up in words ("twice")
    prior_scales: str  # the other priors for tau in words ("half and twice as wide")


@dataclass(frozen=True)
class PlainPage:
    """A page that needs only the site context (home, units, guide, methods, cautions,
    downloads)."""


@dataclass(frozen=True)
class MeasurePage:
    m: MeasureView


@dataclass(frozen=True)
class UnitPage:
    u: UnitView
    trend: list[dict] = field(default_factory=list)  # its published values in earlier cycles


@dataclass(frozen=True)
class ChangesPage:
    previous: str  # the earlier cycle's period ("" when there is none)
    rise: str  # "95%": a chance this high or higher is a clear rise
    fall: str  # "5%": this low or lower is a clear fall
    blocks: list[dict]  # one per measure


@dataclass(frozen=True)
class ModelPage:
    mv: ModelView


@dataclass(frozen=True)
class ProjectFile:
    """``_quarto.yml``: the site context and every page's path."""

    pages: list[str]


# template -> the context it is rendered with (besides SiteContext and ``up``)
TEMPLATE_CONTEXTS: dict[str, type] = {
    "index.qmd.j2": PlainPage,
    "units.qmd.j2": PlainPage,
    "guide.qmd.j2": PlainPage,
    "methods.qmd.j2": PlainPage,
    "cautions.qmd.j2": PlainPage,
    "downloads.qmd.j2": PlainPage,
    "measure.qmd.j2": MeasurePage,
    "unit.qmd.j2": UnitPage,
    "changes.qmd.j2": ChangesPage,
    "model.qmd.j2": ModelPage,
    "_quarto.yml.j2": ProjectFile,
}
