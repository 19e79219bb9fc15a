"""The cycle config: one TOML file per reporting cycle, declared once here.

Every field is a dataclass field with a docstring-like ``doc``; the loader walks these
declarations, so the schema, the defaults, the checks and the generated reference in
DEVELOPERS.md cannot drift apart. All problems are collected and raised together
(:class:`~pipeline.errors.ConfigError`) before any data file is opened.
"""

from __future__ import annotations

import difflib
import hashlib
import re
import tomllib
import types
import typing
from collections.abc import Callable
from dataclasses import MISSING, dataclass, field, fields, replace
from pathlib import Path
from typing import Any, Literal

from pipeline.errors import ConfigError, Problem
from pipeline.formulas import formula_variables

Check = Callable[[Any], "str | None"]


def option(default: Any = MISSING, doc: str = "", check: Check | None = None) -> Any:
    """Declare one config key: its default (none = required), its meaning and its check."""
    return field(default=default, metadata={"doc": doc, "check": check})


def _between(lo: float, hi: float, *, inclusive: bool = True) -> Check:
    def check(value: float) -> str | None:
        ok = lo <= value <= hi if inclusive else lo < value < hi
        if ok:
            return None
        bracket = "from {} to {}" if inclusive else "strictly between {} and {}"
        return f"must be {bracket.format(lo, hi)}; got {value}"

    return check


_SLUG = re.compile(r"^[a-z0-9][a-z0-9_-]{0,39}$")


def _slug(value: str) -> str | None:
    if _SLUG.match(value):
        return None
    return (
        f"'{value}' is not allowed: use 1-40 lower-case letters, digits, '-' or '_', "
        "starting with a letter or digit (it becomes a file name)"
    )


def _nonempty(value: str) -> str | None:
    return None if value.strip() else "must not be empty"


def _site_url(value: str) -> str | None:
    if value == "" or (re.fullmatch(r"https?://[^\s\"'<>]+/", value)):
        return None
    return (
        "must be empty or a full address starting with http:// or https:// and ending "
        f"with '/'; got '{value}'"
    )


def _benchmark(value: str | float) -> str | None:
    if isinstance(value, str):
        return (
            None
            if value == "network"
            else f"must be \"network\" or a rate between 0 and 1; got '{value}'"
        )
    return (
        None
        if 0 < value < 1
        else f"a fixed benchmark rate must be strictly between 0 and 1; got {value}"
    )


@dataclass(frozen=True)
class CycleSection:
    """[cycle]: what this reporting cycle is and where its site goes."""

    title: str = option(doc="Site title shown on every page.", check=_nonempty)
    publisher: str = option(
        doc="Organisation publishing the results (shown on every page).", check=_nonempty
    )
    period: str = option(
        doc='Label of the reporting period, e.g. "April 2025 to March 2026".', check=_nonempty
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
        check=_site_url,
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
        check=_between(1, 86_400),
    )
    unit_column: str = option("unit_id", doc="Cohort column holding the unit id.", check=_nonempty)
    record_column: str = option(
        "",
        doc="Optional cohort column with a unique record id; repeated ids are rejected as "
        "duplicates.",
    )


@dataclass(frozen=True)
class ReportingSection:
    """[reporting]: how results are summarised and what may be published."""

    interval: float = option(
        0.95, doc="Credible interval level (equal-tailed).", check=_between(0.5, 1, inclusive=False)
    )
    minimum_cases: int = option(
        11,
        doc="Units with fewer cases than this are fitted but their numbers are not published "
        "(common practice for small-cell suppression in public health reporting, no source).",
        check=_between(1, 10_000),
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
        check=_benchmark,
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
        check=_between(0.5, 1, inclusive=False),
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
        4, doc="Independent chains (R-hat needs at least 2).", check=_between(2, 16)
    )
    draws: int = option(1000, doc="Kept draws per chain.", check=_between(100, 100_000))
    tune: int = option(
        1000, doc="Warm-up draws per chain (discarded).", check=_between(100, 100_000)
    )
    target_accept: float = option(
        0.9,
        doc="NUTS target acceptance; raise it if divergences appear.",
        check=_between(0.6, 0.999),
    )
    engine: Literal["nutpie", "pymc"] = option(
        "nutpie",
        doc="nutpie (compiled once per cycle, fast) or pymc (PyMC's own NUTS); both sample the "
        "same PyMC model.",
    )
    cores: int = option(
        2, doc="Chains run in parallel on this many processes.", check=_between(1, 64)
    )
    seed: int = option(
        20261202,
        doc="Random seed; the same seed and inputs give the same draws.",
        check=_between(0, 2**32 - 1),
    )


@dataclass(frozen=True)
class ValidationSection:
    """[validation]: how the case-mix models are checked out of sample."""

    folds: int = option(
        5,
        doc="k of k-fold cross-validation of every fitted case-mix model (the coefficients are "
        "refitted k times).",
        check=_between(2, 20),
    )
    deciles: int = option(
        10,
        doc="Risk groups for the calibration table and the Hosmer-Lemeshow test.",
        check=_between(4, 20),
    )


def _threshold(value: str | float) -> str | None:
    if isinstance(value, str):
        return (
            None
            if value == "network"
            else f"must be \"network\" or a risk between 0 and 1; got '{value}'"
        )
    return (
        None if 0 < value < 1 else f"a risk threshold must be strictly between 0 and 1; got {value}"
    )


def _rhs(value: str) -> str | None:
    if "~" in value:
        return (
            "give only the right-hand side of the formula (no '~'); the outcome comes from "
            "'outcome'"
        )
    return _nonempty(value)


@dataclass(frozen=True)
class MeasureSection:
    """[[measures]]: one outcome measure reported for every unit."""

    key: str = option(doc="Short id used in file names and downloads.", check=_slug)
    name: str = option(
        doc='Plain-language name, e.g. "Readmission within 30 days".', check=_nonempty
    )
    definition: str = option(
        doc="One or two plain sentences saying who is counted and what counts as the outcome.",
        check=_nonempty,
    )
    outcome: str = option(
        doc="Cohort column holding the outcome: 0/1 for binary measures, a positive number for "
        "continuous ones "
        "(for a unit summary: the column of observed events).",
        check=_nonempty,
    )
    type: str = option(
        "binary", doc="Outcome type: binary or continuous.", check=lambda v: _outcome_type(v)
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
        check=_rhs,
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
        check=_threshold,
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
OUTCOME_TYPES: dict[str, tuple[str, ...]] = {
    "binary": ("logistic",),
    "continuous": ("gamma", "lognormal"),
}


def _outcome_type(value: str) -> str | None:
    if value in OUTCOME_TYPES:
        return None
    return (
        f"'{value}' is not an outcome type fairgauge fits. Allowed: "
        f"{', '.join(OUTCOME_TYPES)}.{_hint(value, OUTCOME_TYPES)}"
    )


def family_of(measure: MeasureSection) -> str:
    """The measure's case-mix family, after applying the type's default."""
    return measure.family or OUTCOME_TYPES[measure.type][0]


SECTIONS: dict[str, type] = {
    "cycle": CycleSection,
    "inputs": InputsSection,
    "reporting": ReportingSection,
    "sampler": SamplerSection,
    "validation": ValidationSection,
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
    measures: tuple[MeasureSection, ...]

    def measure(self, key: str) -> MeasureSection:
        return next(m for m in self.measures if m.key == key)


def _hint(name: str, allowed: typing.Iterable[str]) -> str:
    close = difflib.get_close_matches(name, list(allowed), n=1, cutoff=0.6)
    return f" Did you mean '{close[0]}'?" if close else ""


def _type_problem(value: Any, hint: Any) -> str | None:
    """Say what is wrong if ``value`` does not fit the annotated type ``hint``."""
    origin = typing.get_origin(hint)
    if origin is Literal:
        choices = typing.get_args(hint)
        if value in choices:
            return None
        return (
            f"must be one of {', '.join(repr(c) for c in choices)}; got "
            f"{value!r}{_hint(str(value), map(str, choices))}"
        )
    if origin in (typing.Union, types.UnionType):
        options = typing.get_args(hint)
        if any(_type_problem(value, o) is None for o in options):
            return None
        return (
            f"must be {' or '.join(o.__name__ for o in options)}; got "
            f"{type(value).__name__} {value!r}"
        )
    if hint is tuple:
        ok = isinstance(value, list) and all(isinstance(v, str) and v.strip() for v in value)
        return None if ok else f"must be a list of column names (text); got {value!r}"
    if hint is Path:
        return (
            None
            if isinstance(value, str) and value.strip()
            else f"must be a path (text); got {value!r}"
        )
    if hint is float:
        ok = isinstance(value, (int, float)) and not isinstance(value, bool)
        return None if ok else f"must be a number; got {type(value).__name__} {value!r}"
    if hint is int:
        ok = isinstance(value, int) and not isinstance(value, bool)
        return None if ok else f"must be a whole number; got {type(value).__name__} {value!r}"
    if hint is bool:
        return None if isinstance(value, bool) else f"must be true or false; got {value!r}"
    if hint is str:
        return (
            None
            if isinstance(value, str)
            else f"must be text; got {type(value).__name__} {value!r}"
        )
    # a bug in this module, not in the user's file
    raise TypeError(f"unsupported config type {hint!r}")


def _build_section(cls: type, table: Any, where: str, base: Path, problems: list[Problem]) -> Any:
    if not isinstance(table, dict):
        problems.append(Problem(where, f"must be a table; got {type(table).__name__}"))
        return None
    hints = typing.get_type_hints(cls)
    known = {f.name for f in fields(cls)}
    for key in table:
        if key not in known:
            problems.append(
                Problem(
                    f"{where}.{key}",
                    f"unknown key.{_hint(key, known)} Allowed: {', '.join(sorted(known))}.",
                )
            )
    values: dict[str, Any] = {}
    for f in fields(cls):
        key = f"{where}.{f.name}"
        if f.name not in table:
            if f.default is MISSING:
                problems.append(Problem(key, f"is required ({f.metadata['doc']})"))
            elif hints[f.name] is Path and f.default is not None:
                # defaults, too, are relative to the config file
                values[f.name] = (base / f.default).resolve()
            continue
        value = table[f.name]
        wrong = _type_problem(value, hints[f.name])
        if wrong is None and f.metadata["check"] is not None:
            wrong = f.metadata["check"](value)
        if wrong:
            problems.append(Problem(key, wrong))
            continue
        if hints[f.name] is Path:
            value = (base / value).resolve()
        elif hints[f.name] is float:
            value = float(value)
        elif hints[f.name] is tuple:
            value = tuple(value)
        values[f.name] = value
    try:
        return cls(**values)
    except TypeError:  # a required key was missing: already reported
        return None


_PASSWORD = re.compile(r"(^|\s)password\s*=|^[a-z]+://[^/@\s]*:[^/@\s]*@", re.IGNORECASE)


def has_password(conninfo: str) -> bool:
    """True when a libpq connection string carries a password (key=value, or user:password@ in a
    URI)."""
    return bool(_PASSWORD.search(conninfo.strip()))


def _check_inputs(inputs: InputsSection, base: Path, problems: list[Problem]) -> InputsSection:
    """Files or database queries, never both for one table; no password in the config; .sql files
    read here."""
    if inputs.database and has_password(inputs.database):
        problems.append(
            Problem(
                "inputs.database",
                "contains a password. Remove it from the config (it is not shown here) "
                "and let libpq read it from PGPASSWORD, ~/.pgpass or a service file "
                "(PGSERVICEFILE).",
            )
        )
    queries = {}
    for name in ("cohort", "units"):
        query = getattr(inputs, f"{name}_query")
        if query and getattr(inputs, name) is not None:
            problems.append(
                Problem(
                    f"inputs.{name}_query",
                    f"is set together with inputs.{name}; give the file or the query, not both.",
                )
            )
        if query and not inputs.database:
            problems.append(
                Problem(
                    f"inputs.{name}_query", "needs inputs.database, the connection to read it from."
                )
            )
        if query.strip().lower().endswith(".sql"):
            path = (base / query.strip()).resolve()
            if not path.is_file():
                problems.append(
                    Problem(
                        f"inputs.{name}_query", f"names the SQL file {path}, which does not exist."
                    )
                )
            else:
                queries[f"{name}_query"] = path.read_text(encoding="utf-8")
    if inputs.units is None and not inputs.units_query:
        problems.append(
            Problem(
                "inputs.units", "is required (the unit table file), or give inputs.units_query."
            )
        )
    return replace(inputs, **queries)


def _check_measures(measures: list[MeasureSection], problems: list[Problem]) -> None:
    """Checks across measures (each field was checked on its own already)."""
    seen: dict[str, int] = {}
    for i, m in enumerate(measures):
        where = f"measures[{i}]"
        if m.key in seen:
            problems.append(
                Problem(
                    f"{where}.key",
                    f"'{m.key}' is already used by measures[{seen[m.key]}]; keys must be unique",
                )
            )
        seen.setdefault(m.key, i)
        families = OUTCOME_TYPES.get(m.type, ())
        if m.family and families and m.family not in families:
            problems.append(
                Problem(
                    f"{where}.family",
                    f"'{m.family}' does not fit a {m.type} measure. Allowed: "
                    f"{', '.join(families)}.{_hint(m.family, families)}",
                )
            )
        if m.type == "continuous" and not m.unit_label.strip():
            problems.append(
                Problem(
                    f"{where}.unit_label",
                    "is required for a continuous measure: say what the outcome is measured "
                    'in, e.g. "days".',
                )
            )
        if m.expected_column and m.casemix != "1":
            problems.append(
                Problem(
                    f"{where}.expected_column",
                    'is set, so the expected values are supplied; leave casemix out (or "1"), '
                    "or use the supplied risk as a covariate in casemix instead.",
                )
            )
        if m.summary:
            for other, default in (("casemix", "1"), ("expected_column", ""), ("social_risk", ())):
                if getattr(m, other) != default:
                    problems.append(
                        Problem(
                            f"{where}.{other}",
                            "cannot be used with summary (unit-level input has no patient rows "
                            "to fit); remove it.",
                        )
                    )
            if m.type != "binary":
                problems.append(
                    Problem(
                        f"{where}.summary",
                        "unit-level input is supported for binary measures only (observed "
                        "events and expected events per unit).",
                    )
                )
        if m.social_risk:
            try:
                used = formula_variables(m.casemix)
            except ValueError:
                used = []
            for v in m.social_risk:
                if v not in used:
                    problems.append(
                        Problem(
                            f"{where}.social_risk",
                            f"'{v}' is not a variable of the case-mix formula '{m.casemix}'; "
                            "list only variables the formula uses.",
                        )
                    )


def load_config(path: str | Path) -> CycleConfig:
    """Read and validate a cycle config, reporting every problem at once."""
    path = Path(path).resolve()
    try:
        raw_bytes = path.read_bytes()
    except OSError as exc:
        raise ConfigError(
            [Problem(str(path), f"cannot be read ({exc.strerror}). Check the path.")]
        ) from None
    try:
        raw = tomllib.loads(raw_bytes.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError([Problem(str(path), f"is not valid TOML: {exc}")]) from None

    problems: list[Problem] = []
    allowed_top = set(SECTIONS) | {"measures"}
    for key in raw:
        if key not in allowed_top:
            problems.append(
                Problem(
                    key,
                    f"unknown section.{_hint(key, allowed_top)} Allowed: "
                    f"{', '.join(sorted(allowed_top))}.",
                )
            )
    base = path.parent
    sections = {
        name: _build_section(cls, raw.get(name, {}), name, base, problems)
        for name, cls in SECTIONS.items()
    }

    raw_measures = raw.get("measures", [])
    if not isinstance(raw_measures, list) or not raw_measures:
        problems.append(Problem("measures", "at least one [[measures]] table is required"))
        raw_measures = []
    measures = [
        _build_section(MeasureSection, t, f"measures[{i}]", base, problems)
        for i, t in enumerate(raw_measures)
    ]
    _check_measures([m for m in measures if m is not None], problems)
    reporting = sections.get("reporting")
    if reporting is not None and reporting.hide_counts_below > reporting.minimum_cases:
        problems.append(
            Problem(
                "reporting.hide_counts_below",
                f"is {reporting.hide_counts_below}, above reporting.minimum_cases "
                f"({reporting.minimum_cases}): a unit with fewer patients than that would show "
                "a small patient count. "
                "Raise minimum_cases to at least hide_counts_below, or lower hide_counts_below.",
            )
        )
    inputs = sections.get("inputs")
    if inputs is not None:
        inputs = _check_inputs(inputs, base, problems)
        sections["inputs"] = inputs
    if (
        inputs is not None
        and inputs.cohort is None
        and not inputs.cohort_query
        and any(m is not None and not m.summary for m in measures)
    ):
        patient = [m.key for m in measures if m is not None and not m.summary]
        problems.append(
            Problem(
                "inputs.cohort",
                f"is required: measure(s) {', '.join(patient)} read patient rows. "
                "Name the cohort file, or give every measure a summary file of unit totals.",
            )
        )

    if problems:
        raise ConfigError(problems)
    return CycleConfig(
        source=path,
        sha256=hashlib.sha256(raw_bytes).hexdigest(),
        measures=tuple(measures),
        **sections,
    )


def reference_table() -> str:
    """Markdown reference of every key (used to keep DEVELOPERS.md honest)."""
    rows = ["| key | default | meaning |", "| --- | --- | --- |"]
    for name, cls in [*SECTIONS.items(), ("measures[]", MeasureSection)]:
        for f in fields(cls):
            default = (
                "required"
                if f.default is MISSING
                else repr(f.default if not isinstance(f.default, Path) else str(f.default))
            )
            rows.append(f"| `{name}.{f.name}` | {default} | {f.metadata['doc']} |")
    return "\n".join(rows)
