"""Pages: Quarto markdown (.qmd) and ``_quarto.yml`` from Jinja2 templates.

Every number is formatted here, in Python, and handed to a template in a typed context;
templates only lay values out. Text that comes from data passes through the ``md`` filter,
which makes it literal in both Quarto (pandoc) and the built-in renderer.
"""

from __future__ import annotations

import hashlib
import json
import math
import re
from dataclasses import dataclass, field
from pathlib import PurePosixPath

import jinja2
import pandas as pd

from pipeline import templates_path
from pipeline.config import CycleConfig
from pipeline.history import PastCycle, changes
from pipeline.results import FIT_SETTINGS, GROUPS, POSITION, STATUS, MeasureResult
from pipeline.website import captions
from pipeline.website.captions import FigureView, attr
from pipeline.website.figures import axis, measure_figure_path, png_of, unit_figure_path
from pipeline.website.funnel import Funnel, outside
from pipeline.website.model_page import model_view

_MD_SPECIAL = set("\\`*_{}[]()#+-.!|~^$@:\"'")
_ENTITIES = {"&": "&amp;", "<": "&lt;", ">": "&gt;"}


def md(text: object) -> str:
    """Escape data text so markdown and HTML show it literally (one line, no markup)."""
    out = []
    for ch in " ".join(str(text).split()):
        if ch in _ENTITIES:
            out.append(_ENTITIES[ch])
        elif ch in _MD_SPECIAL:
            out.append("\\" + ch)
        else:
            out.append(ch)
    return "".join(out)


def code(text: object) -> str:
    """Data text as an inline code span: shown literally, with no escapes visible.

    The fence is longer than any run of backticks inside; '|' is escaped for pipe tables.
    """
    body = " ".join(str(text).split()).replace("|", "\\|")
    fence = "`" * (max((len(run) for run in re.findall(r"`+", body)), default=0) + 1)
    return f"{fence} {body} {fence}"


def slug(unit_id: str, taken: set[str]) -> str:
    """A file-name-safe, stable address for a unit (from its id), unique within ``taken``."""
    base = re.sub(r"[^a-z0-9]+", "-", unit_id.lower()).strip("-")[:60] or "unit"
    candidate, n = base, 2
    while candidate in taken:
        candidate, n = f"{base}-{n}", n + 1
    taken.add(candidate)
    return candidate


def unit_slugs(unit_ids, kept: dict[str, str] | None = None) -> dict[str, str]:
    """Each unit's address: the one it had in an earlier cycle (``kept``), else the slug of its id.

    Addresses do not depend on the order of the units or on which other units exist, except when
    two ids make the same slug: then the later-coming id gets a suffix from a hash of the id
    itself (not a counter), and keeps it in later cycles through ``kept``.
    """
    ids = [str(u) for u in unit_ids]
    out: dict[str, str] = {}
    taken: set[str] = set()
    for uid in ids:  # earlier cycles' addresses first
        old = (kept or {}).get(uid)
        if old and old not in taken:
            out[uid] = old
            taken.add(old)
    plain = {uid: slug(uid, set()) for uid in ids if uid not in out}
    # an id that already is its slug wins it
    for uid in sorted(plain, key=lambda u: (plain[u] != u, u)):
        candidate, n = plain[uid], 6
        while candidate in taken:
            candidate, n = f"{plain[uid]}-{hashlib.sha256(uid.encode()).hexdigest()[:n]}", n + 2
        out[uid] = candidate
        taken.add(candidate)
    return {uid: out[uid] for uid in ids}


def pct(x: float, digits: int = 1) -> str:
    return "" if pd.isna(x) else f"{x * 100:.{digits}f}%"


def span(lo: float, hi: float, digits: int = 1) -> str:
    return "" if pd.isna(lo) else f"{lo * 100:.{digits}f}% to {hi * 100:.{digits}f}%"


def value(measure, x: float) -> str:
    """An adjusted or raw value of ``measure``: a percentage for rates, the outcome's unit
    otherwise."""
    if measure.type == "continuous":
        return "" if pd.isna(x) else f"{x:,.1f} {md(measure.unit_label)}"
    return pct(x)


def value_span(measure, lo: float, hi: float) -> str:
    if measure.type == "continuous":
        return "" if pd.isna(lo) else f"{lo:,.1f} to {hi:,.1f} {md(measure.unit_label)}"
    return span(lo, hi)


def num(x: float, digits: int = 2) -> str:
    return "" if pd.isna(x) else f"{x:.{digits}f}"


def chance(p: float) -> str:
    """A posterior probability in words people read easily, never 0% or 100%."""
    if pd.isna(p):
        return ""
    if p < 0.01:
        return "less than 1%"
    if p > 0.99:
        return "more than 99%"
    return f"{p * 100:.0f}%"


def natural_frequency(rate: float) -> str:
    """'about N in every 100 (or 1,000) patients', with N at least 10 where possible."""
    base = 100 if rate >= 0.1 else 1000
    return f"about {rate * base:.0f} in every {base:,} patients"


SYMBOLS = {"above": "▲", "spans": "●", "below": "▼", "": ""}
# our own marks; the words are always shown too
GROUP_SYMBOLS = {"better": "+", "typical": "=", "worse": "−", "": ""}
# Words that differ between rate measures and mean measures (column heads, sentences).
WORDS = {
    "binary": {
        "raw": "Raw rate",
        "adjusted": "Adjusted rate",
        "network": "Network rate",
        "events": "Events",
        "observed": "Observed",
        "expected": "Expected",
        "chance": "Chance above benchmark",
    },
    "continuous": {
        "raw": "Raw mean",
        "adjusted": "Adjusted mean",
        "network": "Network mean",
        "events": "Total",
        "observed": "Observed total",
        "expected": "Expected total",
        "chance": "Chance above network mean",
    },
}


@dataclass(frozen=True)
class Cell:
    """One unit on one measure, formatted."""

    status: str
    status_words: str
    cases: str
    observed: str
    expected: str
    raw_rate: str
    oe_ratio: str
    rate: str
    interval: str
    ratio: str
    ratio_interval: str
    chance_above: str
    position: str
    position_words: str
    symbol: str
    sentence: str
    group: str = ""
    group_words: str = ""
    group_symbol: str = ""
    rank: str = ""
    weight: str = ""
    other_side: str = ""


@dataclass(frozen=True)
class MeasureView:
    key: str
    name: str
    definition: str
    better: str
    href: str
    model_href: str
    kind: str  # binary or continuous
    words: dict[str, str]  # column and sentence words that differ between rates and means
    figures: list[FigureView]
    funnel_words: str
    patients: str
    events: str
    network_rate: str
    benchmark: str
    benchmark_is_network: bool
    # adjusted value of the typical unit, what small units are pulled towards ("" when it rounds to
    # the benchmark)
    typical: str
    c_statistic: str
    units_in_fit: int
    formula: str
    tau: str
    rhat: str
    ess: str
    divergences: int
    coefficients: list[dict[str, str]]
    sensitivity: list[dict[str, str]] = field(default_factory=list)
    rows: list[dict] = field(default_factory=list)  # unit name, href, Cell
    # unit-level predictors of what units are pulled towards: words, terms, groups, changes
    targets: dict | None = None
    # what the small-count rule hid on this measure, in plain words ("" when nothing)
    count_note: str = ""


@dataclass(frozen=True)
class UnitView:
    id: str
    name: str
    kind: str
    href: str
    figures: list[FigureView]  # position strip, then the trend when history exists
    cells: list[tuple[MeasureView, Cell]]
    summary: str  # one plain sentence over all measures


def _sentence(name: str, m: MeasureResult, row: pd.Series, level: str, min_cases: int) -> str:
    if row["status"] == "too_few":
        return (
            f"This unit had fewer than {min_cases} cases, too few for a fair estimate, so "
            "its numbers are not published."
        )
    if row["status"] == "no_cases":
        return "This unit had no cases for this measure in this period."
    if row["status"] == "withheld":
        return (
            "This unit's numbers are withheld so that a smaller unit's numbers cannot be "
            "worked out "
            "by subtracting the published numbers from the network totals."
        )
    return (
        _estimate_sentence(name, m, row, level)
        + _count_sentence(row)
        + " "
        + _group_sentence(m, row)
        + _target_sentence(m, row)
    )


def _count_sentence(row: pd.Series) -> str:
    """What the small-count rule hides on this unit (disclosure.py), in plain words."""
    if row.get("count_status") == "small":
        return (
            f" Between {row['observed_low']:,.0f} and {row['observed_high']:,.0f} of its "
            f"{row['cases']:,.0f} patients had this "
            "outcome. The exact number is not shown, to protect patients' privacy."
        )
    if row.get("count_status") == "protects":
        return (
            " Its exact number of patients with this outcome is not shown, so that another "
            "unit's small number "
            "cannot be worked out from the network total."
        )
    return ""


# Plain names of the built-in predictors of what small units are pulled towards (targets.py).
TARGET_WORDS = {
    "log_cases": "size (number of cases)",
    "case_mix": "how ill its patients were on average",
}
TARGET_LIKE = {"log_cases": "size", "case_mix": "how ill their patients are", "kind": "kind"}


def target_words(term: str) -> str:
    """A predictor term in plain words, for tables."""
    if term in TARGET_WORDS:
        return TARGET_WORDS[term]
    if term.startswith("kind: "):
        return f"being a {term.removeprefix('kind: ')}"
    return term


def like_words(terms: list[str]) -> str:
    """'size and how ill their patients are': what makes units alike, in plain words."""
    words = list(dict.fromkeys(TARGET_LIKE.get(t.split(":")[0], f"their {t}") for t in terms))
    return words[0] if len(words) == 1 else ", ".join(words[:-1]) + " and " + words[-1]


def _target_sentence(m: MeasureResult, row: pd.Series) -> str:
    """One sentence for a unit whose group depends on what small units are pulled towards."""
    if m.targets is None:
        return ""
    changed = m.targets["changed"]
    hit = changed[changed["unit_id"] == row["unit_id"]]
    if hit.empty:
        return ""
    return (
        " Its group depends on a choice in the model: if every unit were pulled towards one "
        "typical unit, "
        f"it would be {GROUPS[hit['group_without'].iloc[0]].lower()}."
    )


def _group_sentence(m: MeasureResult, row: pd.Series) -> str:
    """The unit's group, how sure we are of it, its rank and how much rests on its own patients."""
    group, other = row["group"], chance(row["prob_other_side"])
    if group == "typical":
        text = (
            f"It is {GROUPS['typical'].lower()}. The data cannot tell it apart from the benchmark."
        )
    else:
        text = (
            f"It {GROUPS[group].lower()} than the benchmark. The chance that it is really "
            f"on the other side is {other}."
        )
    shown = int(m.table["status"].eq("reported").sum())
    text += (
        f" Among the {shown} units shown, its rank is likely between "
        f"{row['rank_lower']:.0f} and {row['rank_upper']:.0f} (1 is best)."
    )
    if pd.notna(row["own_weight"]):
        text += (
            f" About {row['own_weight'] * 100:.0f}% of this estimate comes from the "
            "unit's own patients, and the rest from the other units."
        )
    return text


def _estimate_sentence(name: str, m: MeasureResult, row: pd.Series, level: str) -> str:
    if m.measure.type == "continuous":
        return (
            "Allowing for how ill its patients were, the average here is about "
            f"{value(m.measure, row['rsr_median'])}. "
            f"We are {level} sure the true average is between "
            f"{value(m.measure, row['rsr_lower'])} and {value(m.measure, row['rsr_upper'])}. "
            f"The network average is {value(m.measure, m.benchmark)}. The chance that this "
            f"unit's average is above it is {chance(row['prob_above_benchmark'])}."
        )
    return (
        "Allowing for how ill its patients were, we estimate that "
        f"{natural_frequency(row['rsr_median'])} here would have this outcome. "
        f"We are {level} sure the true rate is between {pct(row['rsr_lower'])} and "
        f"{pct(row['rsr_upper'])}. "
        f"The benchmark is {pct(m.benchmark)}. The chance that this unit's rate is above the "
        f"benchmark is {chance(row['prob_above_benchmark'])}."
    )


def _cell(m: MeasureResult, row: pd.Series, level: str, min_cases: int) -> Cell:
    reported = row["status"] == "reported"
    show = (lambda v: v) if reported else (lambda v: "")
    count = row.get("count_status", "shown") if reported else ""
    counted = (lambda v: v) if reported and count == "shown" else (lambda v: "")
    return Cell(
        status=row["status"],
        status_words=STATUS[row["status"]],
        cases=f"{int(row['cases']):,}"
        if reported
        else {"too_few": f"fewer than {min_cases}", "withheld": "withheld"}.get(row["status"], "0"),
        observed=_observed_words(row, count),
        expected=(
            f"{row['expected']:,.1f}" if m.measure.type == "binary" else f"{row['expected']:,.0f}"
        )
        if reported
        else "",
        raw_rate=counted(value(m.measure, row["raw_rate"])),
        oe_ratio=counted(num(row["oe_ratio"])),
        rate=show(value(m.measure, row["rsr_median"])),
        interval=show(value_span(m.measure, row["rsr_lower"], row["rsr_upper"])),
        ratio=show(num(row["ratio_median"])),
        ratio_interval=show(f"{num(row['ratio_lower'])} to {num(row['ratio_upper'])}"),
        chance_above=show(chance(row["prob_above_benchmark"])),
        position=row["position"],
        position_words=POSITION.get(row["position"], STATUS[row["status"]]),
        symbol=SYMBOLS[row["position"]],
        sentence=_sentence(md(row["unit_name"]), m, row, level, min_cases),
        group=row["group"] if reported else "",
        group_words=GROUPS.get(row["group"], STATUS[row["status"]])
        if reported
        else STATUS[row["status"]],
        group_symbol=GROUP_SYMBOLS.get(row["group"], "") if reported else "",
        rank=f"{row['rank_median']:.0f} ({row['rank_lower']:.0f} to {row['rank_upper']:.0f})"
        if reported
        else "",
        weight=counted(f"{row['own_weight'] * 100:.0f}%") if pd.notna(row["own_weight"]) else "",
        other_side=show(chance(row["prob_other_side"])),
    )


def count_note(table: pd.DataFrame, threshold: int) -> str:
    """One measure's small-count rule in plain words: how many counts are ranges, how many hidden to
    protect them."""
    status = table["count_status"] if "count_status" in table else pd.Series(dtype=str)
    few, cover = int((status == "small").sum()), int((status == "protects").sum())
    if not few and not cover:
        return ""
    text = (
        f"On {few} {'unit' if few == 1 else 'units'}, fewer than {threshold} patients had this "
        f"outcome, or fewer than {threshold} "
        "did not. To protect those patients, the table gives a range instead of the number, "
        "and leaves out the raw "
        "rate, the O/E ratio and the share of own data, which would give the number back."
    )
    if cover:
        text += (
            f" On {cover} more {'unit' if cover == 1 else 'units'}, the number is not shown "
            "either, because the network "
            "total minus the numbers shown would give a small number back."
        )
    return (
        text
        + " These units are left out of the funnel plot and the raw-to-adjusted picture. Their "
        "adjusted values are shown."
    )


def _observed_words(row: pd.Series, count: str) -> str:
    """The observed count as published: the number, its range when small, or "not shown" when it
    protects another."""
    if count == "shown":
        return f"{row['observed']:,.0f}"
    if count == "small":
        return f"{row['observed_low']:,.0f} to {row['observed_high']:,.0f}"
    return "not shown" if count == "protects" else ""


def _if_drawn(path: str, drawn: dict) -> str:
    return path if path in drawn else ""


def _measure_figures(
    m: MeasureResult, drawn: dict, f: Funnel | None, level: str
) -> tuple[list[FigureView], str]:
    """The measure's pictures (intervals, funnel, movement) with their words and tables; and the
    funnel in a sentence."""
    k = axis(m)[0]
    unit = md(m.measure.unit_label) if m.measure.type == "continuous" else "%"
    fmt = (
        (lambda x: f"{x:,.1f} {unit}")
        if m.measure.type == "continuous"
        else (lambda x: f"{x:.1f}%")
    )
    bench = fmt(m.benchmark * k)
    out = []
    path = measure_figure_path(m.measure.key, "intervals")
    if path in drawn:
        out.append(
            captions.intervals(
                path,
                _if_drawn(png_of(path), drawn),
                drawn[path],
                fmt,
                lambda lo, hi: f"{fmt(lo)} to {fmt(hi)}",
                bench,
                level,
                md,
            )
        )
    words = ""
    path = measure_figure_path(m.measure.key, "funnel")
    if f is not None:
        counts = outside(f)
        if path in drawn:
            out.append(
                captions.funnel(
                    path,
                    _if_drawn(png_of(path), drawn),
                    drawn[path],
                    fmt,
                    bench,
                    counts,
                    f.phi,
                    f.widened,
                    md,
                )
            )
        spread = (
            "about what chance alone would give"
            if f.phi < 1.5
            else f"{f.phi:.1f} times what chance alone would give"
        )
        words = (
            f"In the funnel plot, {counts['998']} of {counts['units']} units are outside the "
            f"outer (99.8%) limits and {counts['95']} are outside the inner (95%) limits. "
            f"The spread between units is {spread}. "
            + (
                "The limits were widened to allow for it."
                if f.widened
                else "The limits were not widened for it."
            )
        )
    path = measure_figure_path(m.measure.key, "movement")
    if path in drawn:
        points_word = "percentage points" if m.measure.type == "binary" else unit
        out.append(captions.movement(path, "", drawn[path], fmt, bench, points_word, md))
    return out, words


def _unit_figures(name: str, slug_: str, drawn: dict) -> list[FigureView]:
    out = []
    path = unit_figure_path(slug_, "position")
    if path in drawn:
        out.append(captions.position(path, drawn[path], name, md))
    path = unit_figure_path(slug_, "trend")
    if path in drawn:
        out.append(captions.trend(path, drawn[path], name, md))
    return out


def _unit_summary(cells: list[tuple[MeasureView, Cell]]) -> str:
    """One sentence over all measures: how many reported and in which groups."""
    reported = [(m, c) for m, c in cells if c.status == "reported"]
    if not reported:
        return "No measure has enough cases at this unit to report in this period."
    parts = []
    for g in ("worse", "better"):
        names = [m.name for m, c in reported if c.group == g]
        if names:
            parts.append(f"{GROUPS[g].lower()} on {', '.join(names)}")
    typical = sum(c.group == "typical" for _, c in reported)
    text = f"{len(reported)} of {len(cells)} measures are reported. "
    if parts:
        text += "This unit " + " and ".join(parts) + ". "
    text += (
        f"On {typical} {'measure' if typical == 1 else 'measures'} it is in line with the "
        "benchmark."
    )
    return text


def views(
    config: CycleConfig,
    results: list[MeasureResult],
    units: pd.DataFrame,
    slugs: dict[str, str],
    drawn: dict,
    funnels: dict[str, Funnel | None] | None = None,
) -> tuple[list[MeasureView], list[UnitView]]:
    """Format every number once; return the measure and unit views the templates lay out."""
    level = f"{config.reporting.interval * 100:g}%"
    measures: list[MeasureView] = []
    cells: dict[str, list[tuple[MeasureView, Cell]]] = {uid: [] for uid in units.index}
    for m in results:
        d = m.diagnostics
        coefs = [
            {
                "term": md(term),
                "ratio": num(r["ratio"]),
                "interval": f"{num(r['lower'])} to {num(r['upper'])}",
            }
            for term, r in m.casemix.coefficients.iterrows()
        ]
        continuous = m.measure.type == "continuous"
        figures, funnel_words = _measure_figures(
            m, drawn, (funnels or {}).get(m.measure.key), level
        )
        view = MeasureView(
            key=m.measure.key,
            name=md(m.measure.name),
            definition=md(m.measure.definition),
            better=m.measure.better,
            href=f"measures/{m.measure.key}.qmd",
            model_href=f"models/{m.measure.key}.qmd",
            kind=m.measure.type,
            words=WORDS["continuous" if continuous else "binary"],
            figures=figures,
            funnel_words=funnel_words,
            patients=f"{m.casemix.patients:,}",
            events=f"{m.casemix.events:,.0f}"
            + (f" {md(m.measure.unit_label)}" if continuous else ""),
            network_rate=value(m.measure, m.network_rate),
            benchmark=value(m.measure, m.benchmark),
            benchmark_is_network=config.reporting.benchmark == "network" or continuous,
            typical=""
            if m.typical != m.typical
            or value(m.measure, m.typical) == value(m.measure, m.benchmark)
            else value(m.measure, m.typical),
            c_statistic=num(m.casemix.c_statistic, 3)
            if not continuous
            and m.casemix.patients
            and m.casemix.c_statistic == m.casemix.c_statistic
            else "not applicable",
            units_in_fit=m.casemix.units_in_fit,
            formula=code(m.casemix.formula),
            tau=f"{num(m.tau[0])} ({num(m.tau[1])} to {num(m.tau[2])})",
            rhat=num(d.rhat_max, 3),
            ess=f"{d.ess_bulk_min:,.0f}",
            divergences=d.divergences,
            coefficients=coefs,
            sensitivity=[
                {
                    "prior": f"HalfNormal({alt['scale']:g})",
                    "method": f"{alt['method']} (k-hat {alt['k_hat']:.2f})",
                    "changed": "; ".join(
                        f"{md(name)}: {GROUPS[a].lower()} → {GROUPS[b].lower()}"
                        for name, a, b in alt["changed"]
                    )
                    or "none",
                    "count": str(len(alt["changed"])),
                }
                for alt in m.sensitivity
            ],
            targets=_targets_view(m),
            count_note=count_note(m.table, config.reporting.hide_counts_below),
        )
        ordered = m.table.sort_values(
            ["status", "rsr_median"],
            key=lambda s: (
                s.map({"reported": 0, "too_few": 1, "withheld": 2, "no_cases": 3})
                if s.name == "status"
                else s
            ),
        )
        for _, row in ordered.iterrows():
            cell = _cell(m, row, level, config.reporting.minimum_cases)
            view.rows.append(
                {
                    "name": md(row["unit_name"]),
                    "href": f"units/{slugs[row['unit_id']]}.qmd",
                    "cell": cell,
                }
            )
            cells[row["unit_id"]].append((view, cell))
        measures.append(view)
    unit_views = [
        UnitView(
            id=md(uid),
            name=md(u["name"]),
            kind=md(u["kind"]),
            href=f"units/{slugs[uid]}.qmd",
            figures=_unit_figures(u["name"], slugs[uid], drawn),
            cells=cells[uid],
            summary=_unit_summary(cells[uid]),
        )
        for uid, u in units.iterrows()
    ]
    return measures, unit_views


def _targets_view(m: MeasureResult) -> dict | None:
    """What the methods and measure pages say about the predictors of what units are pulled
    towards."""
    t = m.targets
    if t is None:
        return None
    terms = [
        {
            "term": md(target_words(x["term"])),
            "code": code(x["term"]),
            "sd": f"{x['sd']:.2f} (cases x {math.exp(x['sd']):.1f})"
            if x["term"] == "log_cases"
            else f"{x['sd']:.3g}",
            "effect": f"{num(x['effect_median'])} ({num(x['effect_lower'])} to "
            f"{num(x['effect_upper'])})",
        }
        for x in t["terms"]
    ]
    changed = [
        {
            "name": md(c.unit_name),
            "with": GROUPS[c.group_with].lower(),
            "without": GROUPS[c.group_without].lower(),
        }
        for c in t["changed"].itertuples()
    ]
    groups = {g: f"{n['with']} / {n['without']}" for g, n in t["groups"].items()}
    return {
        "words": md(like_words([x["term"] for x in t["terms"]])),
        "terms": terms,
        "changed": changed,
        "groups": groups,
        "count": len(changed),
    }


def environment() -> jinja2.Environment:
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(templates_path()),
        undefined=jinja2.StrictUndefined,
        autoescape=False,  # output is markdown; data text is escaped by the md filter instead
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )
    env.filters["md"] = md
    env.filters["code"] = code
    env.filters["attr"] = attr
    # a JSON string is a YAML scalar
    env.filters["yaml"] = lambda s: json.dumps(str(s), ensure_ascii=False)
    return env


@dataclass(frozen=True)
class Page:
    path: str  # relative to the Quarto project, posix
    text: str


def _up(path: str) -> str:
    return "../" * (len(PurePosixPath(path).parts) - 1)


def trends(
    config: CycleConfig, results: list[MeasureResult], past: list[PastCycle], slugs: dict[str, str]
) -> dict[str, list[dict]]:
    """Per unit, its published adjusted rates in earlier cycles and now (reported cycles only)."""
    out: dict[str, list[dict]] = {uid: [] for uid in slugs}
    for r in results:
        cycles = [(p.period, p.table[p.table["measure"] == r.measure.key]) for p in past] + [
            (config.cycle.period, r.table)
        ]
        for period, table in cycles:
            for _, row in table[table["status"] == "reported"].iterrows():
                if row["unit_id"] in out:
                    out[row["unit_id"]].append(
                        {
                            "measure": md(r.measure.name),
                            "period": md(period),
                            "rate": value(r.measure, row["rsr_median"]),
                            "interval": value_span(r.measure, row["rsr_lower"], row["rsr_upper"]),
                        }
                    )
    return out


def change_views(
    results: list[MeasureResult], previous: PastCycle | None, slugs: dict[str, str]
) -> list[dict]:
    """The changes page, one block per measure (empty when there is no earlier cycle)."""
    if previous is None:
        return []
    table = changes(results, previous)
    blocks = []
    for r in results:
        rows = table[table["measure"] == r.measure.key] if len(table) else table
        blocks.append(
            {
                "name": md(r.measure.name),
                "rows": [
                    {
                        "name": md(x["unit_name"]),
                        "href": f"units/{slugs[x['unit_id']]}.qmd",
                        "before": f"{value(r.measure, x['before'])} "
                        f"({value_span(r.measure, x['before_lower'], x['before_upper'])})",
                        "now": f"{value(r.measure, x['now'])} "
                        f"({value_span(r.measure, x['now_lower'], x['now_upper'])})",
                        "chance": chance(x["p_higher"]),
                        "words": x["words"],
                    }
                    for _, x in rows.sort_values("p_higher", ascending=False).iterrows()
                ],
            }
        )
    return blocks


def render_pages(
    config: CycleConfig,
    results: list[MeasureResult],
    units: pd.DataFrame,
    slugs: dict[str, str],
    drawn: dict,
    past: list[PastCycle],
    site: dict,
    funnels: dict[str, Funnel | None] | None = None,
) -> list[Page]:
    """All pages of the site plus ``_quarto.yml``, as text."""
    env = environment()
    measures, unit_views = views(config, results, units, slugs, drawn, funnels)
    unit_trends = trends(config, results, past, slugs)
    common = {
        "cycle": config.cycle,
        "site": site,
        "measures": measures,
        "units": unit_views,
        "limits": FIT_SETTINGS.sampler_checks,
        "priors": FIT_SETTINGS.priors,
        "reporting": config.reporting,
        "sampler": config.sampler,
        "validation": config.validation,
        "level": f"{config.reporting.interval * 100:g}%",
        "positions": POSITION,
        "symbols": SYMBOLS,
        "groups": GROUPS,
        "group_symbols": GROUP_SYMBOLS,
        "k_hat_max": FIT_SETTINGS.k_hat_max,
    }
    pages: list[tuple[str, str, dict]] = [
        ("index.qmd", "index.qmd.j2", {}),
        ("units.qmd", "units.qmd.j2", {}),
        ("guide.qmd", "guide.qmd.j2", {}),
        *[(m.href, "measure.qmd.j2", {"m": m}) for m in measures],
        *[
            (u.href, "unit.qmd.j2", {"u": u, "trend": unit_trends[uid] if past else []})
            for uid, u in zip(units.index, unit_views, strict=True)
        ],
        (
            "changes.qmd",
            "changes.qmd.j2",
            {
                "previous": md(past[-1].period) if past else "",
                "blocks": change_views(results, past[-1] if past else None, slugs),
            },
        ),
        *[
            (f"models/{m.measure.key}.qmd", "model.qmd.j2", {"mv": model_view(m, drawn, md, code)})
            for m in results
        ],
        ("methods.qmd", "methods.qmd.j2", {}),
        ("cautions.qmd", "cautions.qmd.j2", {}),
        ("downloads.qmd", "downloads.qmd.j2", {}),
    ]
    out = [
        Page(path, env.get_template(f"qmd/{tpl}").render(**common, **extra, up=_up(path)))
        for path, tpl, extra in pages
    ]
    out.append(
        Page(
            "_quarto.yml",
            env.get_template("qmd/_quarto.yml.j2").render(
                **common, pages=[p for p, _, _ in pages], up=""
            ),
        )
    )
    return out
