"""Reading a cycle config: every problem is collected and raised together
(:class:`~pipeline.errors.ConfigError`) before any data file is opened.
"""

from __future__ import annotations

import hashlib
import re
import tomllib
import types
import typing
from dataclasses import MISSING, fields, replace
from pathlib import Path
from typing import Any, Literal

from pipeline.config.schema import SECTIONS, CycleConfig, InputsSection, MeasureSection
from pipeline.config.values import close_match
from pipeline.errors import ConfigError, Problem
from pipeline.families import OUTCOME_TYPES
from pipeline.formulas import formula_variables


def _type_problem(value: Any, hint: Any) -> str | None:
    """Say what is wrong if ``value`` does not fit the annotated type ``hint``."""
    origin = typing.get_origin(hint)
    if origin is Literal:
        choices = typing.get_args(hint)
        if value in choices:
            return None
        return (
            f"must be one of {', '.join(repr(c) for c in choices)}; got "
            f"{value!r}{close_match(str(value), map(str, choices))}"
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
        return None if ok else f"must be a list of names (text); got {value!r}"
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
                    f"unknown key.{close_match(key, known)} Allowed: {', '.join(sorted(known))}.",
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
                    f"{', '.join(families)}.{close_match(m.family, families)}",
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
            _check_unit_level(m, where, problems)
        if m.social_risk:
            _check_social_risk(m, where, problems)


def _check_unit_level(m: MeasureSection, where: str, problems: list[Problem]) -> None:
    """A measure read from unit totals has no patient-level settings, and is binary."""
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


def _check_social_risk(m: MeasureSection, where: str, problems: list[Problem]) -> None:
    """Each social-risk factor is a variable of the measure's case-mix formula."""
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


def _read_toml(path: Path) -> tuple[bytes, dict]:
    """The config file's bytes (for its hash) and its TOML tables."""
    try:
        raw_bytes = path.read_bytes()
    except OSError as exc:
        raise ConfigError(
            [Problem(str(path), f"cannot be read ({exc.strerror}). Check the path.")]
        ) from None
    try:
        return raw_bytes, tomllib.loads(raw_bytes.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError([Problem(str(path), f"is not valid TOML: {exc}")]) from None


def _check_reporting(reporting, problems: list[Problem]) -> None:
    """No published unit can have fewer patients than the small-count threshold."""
    if reporting.hide_counts_below > reporting.minimum_cases:
        problems.append(
            Problem(
                "reporting.hide_counts_below",
                f"is {reporting.hide_counts_below}, above reporting.minimum_cases "
                f"({reporting.minimum_cases}): a unit with fewer patients than that would show "
                "a small patient count. "
                "Raise minimum_cases to at least hide_counts_below, or lower hide_counts_below.",
            )
        )


def _check_cohort_named(inputs: InputsSection, measures: list, problems: list[Problem]) -> None:
    """A cohort is named whenever a measure reads patient rows."""
    if inputs.cohort is None and not inputs.cohort_query:
        patient = [m.key for m in measures if m is not None and not m.summary]
        if patient:
            problems.append(
                Problem(
                    "inputs.cohort",
                    f"is required: measure(s) {', '.join(patient)} read patient rows. "
                    "Name the cohort file, or give every measure a summary file of unit totals.",
                )
            )


def _check_staging(cycle: Any, review: Any, problems: list[Problem]) -> None:
    """The staging folder is apart from the public output and the history: nothing staged (the
    confidential previews) may sit inside what is published."""
    if cycle is None or review is None:
        return
    staging = review.staging
    for name, folder in (("cycle.output", cycle.output), ("cycle.history", cycle.history)):
        if staging == folder or staging.is_relative_to(folder) or folder.is_relative_to(staging):
            problems.append(
                Problem(
                    "review.staging",
                    f"is {staging}, which overlaps {name} ({folder}); staged previews are "
                    "confidential and must never sit inside the published site or the history. "
                    "Choose a folder of its own.",
                )
            )


def load_config(path: str | Path) -> CycleConfig:
    """Read and validate a cycle config, reporting every problem at once."""
    path = Path(path).resolve()
    raw_bytes, raw = _read_toml(path)
    problems: list[Problem] = []
    allowed_top = set(SECTIONS) | {"measures"}
    for key in raw:
        if key not in allowed_top:
            problems.append(
                Problem(
                    key,
                    f"unknown section.{close_match(key, allowed_top)} Allowed: "
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
    if reporting is not None:
        _check_reporting(reporting, problems)
    _check_staging(sections.get("cycle"), sections.get("review"), problems)
    inputs = sections.get("inputs")
    if inputs is not None:
        inputs = _check_inputs(inputs, base, problems)
        sections["inputs"] = inputs
        _check_cohort_named(inputs, measures, problems)
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
