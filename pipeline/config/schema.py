"""The cycle config's sections and keys: each key is a dataclass field with its default, its
meaning (``doc``) and its check (``values.py``)."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Literal

from pipeline.config.values import (
    SHORT_TITLE,
    benchmark_value,
    between,
    file_name,
    formula_rhs,
    nonempty,
    option,
    outcome_type,
    short_title,
    site_url,
    threshold_value,
)
from pipeline.families import FAMILIES, OUTCOME_TYPES, Family


@dataclass(frozen=True)
class CycleSection:
    """[cycle]: what this reporting cycle is and where its site goes."""

    title: str = option(doc="Site title shown on every page.", check=nonempty)
    publisher: str = option(
        doc="Organisation publishing the results (shown on every page).", check=nonempty
    )
    period: str = option(
        doc='Label of the reporting period, e.g. "April 2025 to March 2026".', check=nonempty
    )
    short_title: str = option(
        "",
        doc="Short site name for the navigation bar (at most 32 characters); empty = the title "
        'when it is that short, else "Results by unit".',
        check=short_title,
    )
    output: Path = option(
        Path("site"), doc="Folder that receives the finished site (relative to the config file)."
    )
    renderer: Literal["auto", "quarto", "builtin"] = option(
        "auto", doc="auto: Quarto when the `quarto` command is found, else the built-in renderer."
    )
    invented_data: bool = option(
        False, doc="True for demonstration data: every page then says the data are invented."
    )
    site_url: str = option(
        "",
        doc="Public address the site will be published at, ending with '/' (Quarto's site-url "
        "and each page's canonical "
        "link); empty when not known.",
        check=site_url,
    )
    cache: Path = option(
        Path(".fairgauge-cache"),
        doc="Folder for cached fits and figures (relative to the config file); unchanged data "
        "and model settings are not refitted.",
    )
    history: Path = option(
        Path("history"),
        doc="Folder where each published cycle's results are kept, for trends and the changes "
        "page (relative to the config file).",
    )

    @property
    def navbar_title(self) -> str:
        """The name in the navigation bar."""
        if self.short_title:
            return self.short_title
        return self.title if len(self.title) <= SHORT_TITLE else "Results by unit"


@dataclass(frozen=True)
class InputsSection:
    """[inputs]: the cohort file and the unit table."""

    units: Path = option(
        None, doc="Unit table (CSV or Parquet) with columns id, name, kind (or units_query)."
    )
    cohort: Path = option(
        None,
        doc="Patient-level rows (CSV or Parquet), one per index admission or procedure. "
        "Required unless every "
        "measure is read from unit totals (summary), or cohort_query is given.",
    )
    database: str = option(
        "",
        doc="PostgreSQL connection for cohort_query and units_query: a libpq connection string "
        '("host=... dbname=... user=..."), a URI or "service=name". Never a password: libpq '
        "reads it from "
        "PGPASSWORD, ~/.pgpass or the service file.",
    )
    cohort_query: str = option(
        "",
        doc="Read the cohort from the database: a SELECT, a .sql file beside the config, or a "
        "table name.",
    )
    units_query: str = option(
        "",
        doc="Read the unit table from the database: a SELECT, a .sql file beside the config, "
        "or a table name.",
    )
    statement_timeout: float = option(
        60.0,
        doc="Seconds a database query may run before it is cancelled.",
        check=between(1, 86_400),
    )
    unit_column: str = option("unit_id", doc="Cohort column holding the unit id.", check=nonempty)
    record_column: str = option(
        "",
        doc="Optional cohort column with a unique record id; repeated ids are rejected as "
        "duplicates.",
    )


@dataclass(frozen=True)
class ReportingSection:
    """[reporting]: how results are summarised and what may be published."""

    interval: float = option(
        0.95, doc="Credible interval level (equal-tailed).", check=between(0.5, 1, inclusive=False)
    )
    minimum_cases: int = option(
        11,
        doc="Units with fewer cases than this are fitted but their numbers are not published "
        "(common practice for small-cell suppression in public health reporting, no source).",
        check=between(1, 10_000),
    )
    hide_counts_below: int = option(
        11,
        doc="Small-count rule: on a published unit, a count of patients with the outcome (or "
        "without it) from 1 to this "
        "number minus 1 is shown as a range, with everything that would give it back (raw "
        "rate, O/E, own-data weight, and "
        "one more count where the network total would). 0 shows every count. At most "
        "minimum_cases, so that no published "
        "patient count is small either (a rule of 11 is common practice in US public "
        "reporting; from memory, no source).",
        check=lambda v: (
            None
            if v == 0 or 3 <= v <= 1000
            else f"must be 0 (off) or a whole number from 3 to 1000; got {v}"
        ),
    )
    benchmark: str | float = option(
        "network",
        doc='"network" (the network\'s observed rate, or mean for continuous measures) or a '
        "fixed rate between 0 "
        "and 1 (binary measures; continuous measures always use the network mean).",
        check=benchmark_value,
    )
    grouping: Literal["interval", "probability"] = option(
        "interval",
        doc="Rule for the three groups: interval (the credible interval lies wholly on one "
        "side of the benchmark) or "
        "probability (the posterior probability of being on one side is at least "
        "grouping_probability).",
    )
    grouping_probability: float = option(
        0.95,
        doc="Threshold of the probability rule (ignored by the interval rule).",
        check=between(0.5, 1, inclusive=False),
    )
    funnel_overdispersion: bool = option(
        False,
        doc="Widen the funnel plots' control limits for the spread between units beyond chance "
        "(Spiegelhalter 2005, "
        "additive random effects); the estimated spread is shown either way.",
    )


@dataclass(frozen=True)
class SamplerSection:
    """[sampler]: PyMC's NUTS settings for the shrinkage fits."""

    chains: int = option(
        4, doc="Independent chains (R-hat needs at least 2).", check=between(2, 16)
    )
    draws: int = option(1000, doc="Kept draws per chain.", check=between(100, 100_000))
    tune: int = option(
        1000, doc="Warm-up draws per chain (discarded).", check=between(100, 100_000)
    )
    target_accept: float = option(
        0.9,
        doc="NUTS target acceptance; raise it if divergences appear.",
        check=between(0.6, 0.999),
    )
    engine: Literal["nutpie", "pymc"] = option(
        "nutpie",
        doc="nutpie (compiled once per cycle, fast) or pymc (PyMC's own NUTS); both sample the "
        "same PyMC model.",
    )
    cores: int = option(
        2, doc="Chains run in parallel on this many processes.", check=between(1, 64)
    )
    seed: int = option(
        20261202,
        doc="Random seed; the same seed and inputs give the same draws.",
        check=between(0, 2**32 - 1),
    )


@dataclass(frozen=True)
class ValidationSection:
    """[validation]: how the case-mix models are checked out of sample."""

    folds: int = option(
        5,
        doc="k of k-fold cross-validation of every fitted case-mix model (the coefficients are "
        "refitted k times).",
        check=between(2, 20),
    )
    deciles: int = option(
        10,
        doc="Risk groups for the calibration table and the Hosmer-Lemeshow test.",
        check=between(4, 20),
    )


@dataclass(frozen=True)
class ReviewSection:
    """[review]: staging a cycle for confidential unit previews and sign-off before it is
    published."""

    staging: Path = option(
        Path("staged"),
        doc="Folder that receives a staged cycle: the site as it would be published, the review "
        "summary and one confidential preview per unit (relative to the config file; never "
        "inside the output folder).",
    )
    required: bool = option(
        False,
        doc="True: `fairgauge build` refuses to publish; every cycle goes through `fairgauge "
        "stage`, `sign-off` and `promote`.",
    )
    sign_off_roles: tuple = option(
        (),
        doc="Roles that must all have signed off before `fairgauge promote` publishes, e.g. "
        '["quality committee", "legal"] (compared without case); empty = any one sign-off.',
    )
    methods_note: bool = option(
        True,
        doc="True: the methods page of a staged cycle says that each unit previewed its results "
        "before publication and that publication needed sign-off.",
    )


@dataclass(frozen=True)
class MeasureSection:
    """[[measures]]: one outcome measure reported for every unit."""

    key: str = option(doc="Short id used in file names and downloads.", check=file_name)
    name: str = option(
        doc='Plain-language name, e.g. "Readmission within 30 days".', check=nonempty
    )
    definition: str = option(
        doc="One or two plain sentences saying who is counted and what counts as the outcome.",
        check=nonempty,
    )
    outcome: str = option(
        doc="Cohort column holding the outcome: 0/1 for binary measures, a positive number for "
        "continuous ones "
        "(for a unit summary: the column of observed events).",
        check=nonempty,
    )
    type: str = option(
        "binary", doc="Outcome type: binary or continuous.", check=lambda v: outcome_type(v)
    )
    family: str = option(
        "",
        doc="Case-mix model family; empty = the type's default. binary: logistic; continuous: "
        "gamma or lognormal.",
    )
    unit_label: str = option(
        "",
        doc='What a continuous outcome is measured in, e.g. "days" (required for continuous '
        "measures).",
    )
    better: Literal["lower", "higher"] = option(
        "lower", doc="Which direction is better for patients."
    )
    casemix: str = option(
        "1",
        doc="Right-hand side of the case-mix formula (patsy syntax: C() categories, bs()/cr() "
        "splines, a:b interactions), "
        'e.g. "C(age_band) + diabetes"; "1" = no adjustment. logit(p) turns a supplied risk '
        "into a covariate.",
        check=formula_rhs,
    )
    missing: Literal["stop", "drop", "impute"] = option(
        "stop",
        doc="Rows with a missing risk factor: stop (the cycle fails and lists them), drop "
        "(left out of this measure, counted "
        "per unit) or impute (median of a numeric factor, most common value of a category; "
        "counted).",
    )
    expected_column: str = option(
        "",
        doc="Cohort column with each patient's expected value from a risk model fitted "
        "elsewhere (a risk for binary "
        "measures); it is used as the expected value itself and no case-mix model is fitted.",
    )
    summary: str = option(
        "",
        doc="Unit-level input: a CSV or Parquet file (relative to the config file) with the "
        "unit column and columns "
        "cases, <outcome> and expected; no patient rows are read for this measure. Binary "
        "measures only. With "
        "inputs.database it may instead be a table name, a SELECT or a .sql file giving those "
        "columns.",
    )
    social_risk: tuple = option(
        (),
        doc="Social-risk variables of the case-mix formula; the cycle also fits without them "
        "and reports which units' "
        "position changes.",
    )
    risk_threshold: str | float = option(
        "network",
        doc="Risk above which a patient counts as predicted to have the outcome (sensitivity, "
        "specificity, "
        'PPV); "network" = the network rate.',
        check=threshold_value,
    )
    pull_towards: tuple = option(
        (),
        doc="What a small unit is pulled towards: unit-level predictors of the shrinkage "
        "model's prior mean. Built in: "
        "log_cases (unit size), case_mix (the unit's average patient risk), kind (from the "
        "units table); or any numeric "
        "column of the units table. Empty = every unit is pulled towards one typical unit. "
        "Verdicts still compare "
        "with the benchmark; the methods page shows the groups with and without these predictors.",
    )


# Built-in outcome types: a data table, one row per type; the first family is the default.


def family_of(measure: MeasureSection) -> str:
    """The measure's case-mix family, after applying the type's default."""
    return measure.family or OUTCOME_TYPES[measure.type][0]


def family_for(measure: MeasureSection) -> Family:
    """The measure's entry in the families table (families.py): the one lookup."""
    return FAMILIES[family_of(measure)]


SECTIONS: dict[str, type] = {
    "cycle": CycleSection,
    "inputs": InputsSection,
    "reporting": ReportingSection,
    "sampler": SamplerSection,
    "validation": ValidationSection,
    "review": ReviewSection,
}


@dataclass(frozen=True)
class CycleConfig:
    """A validated cycle config. Paths are absolute."""

    source: Path
    sha256: str
    cycle: CycleSection
    inputs: InputsSection
    reporting: ReportingSection
    sampler: SamplerSection
    validation: ValidationSection
    review: ReviewSection
    measures: tuple[MeasureSection, ...]

    def measure(self, key: str) -> MeasureSection:
        return next(m for m in self.measures if m.key == key)
