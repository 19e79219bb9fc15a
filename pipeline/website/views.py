"""The views the page templates lay out: every measure, unit and cell formatted once."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import pandas as pd

from pipeline.config import CycleConfig, family_for
from pipeline.results import GROUPS, POSITION, STATUS, MeasureResult
from pipeline.website.captions import FigureView
from pipeline.website.figure_views import measure_figures, unit_figures
from pipeline.website.funnel import Funnel
from pipeline.website.markup import chance, code_span, markdown_literal, num, value, value_span
from pipeline.website.sentences import (
    GROUP_SYMBOLS,
    SYMBOLS,
    WORDS,
    count_note,
    like_words,
    observed_words,
    target_words,
    unit_sentence,
)


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
    units_listed: int = 0  # units in the unit table
    units_shown: int = 0  # of them, reported
    units_worse: int = 0
    units_better: int = 0


@dataclass(frozen=True)
class UnitView:
    id: str
    name: str
    kind: str
    href: str
    figures: list[FigureView]  # position strip, then the trend when history exists
    cells: list[tuple[MeasureView, Cell]]
    overview: str  # one plain sentence over all measures
    measures_reported: int = 0  # measures with enough cases at this unit to report
    measures_listed: int = 0


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
        observed=observed_words(row, count),
        expected=(
            f"{row['expected']:,.1f}"
            if family_for(m.measure).counts_events
            else f"{row['expected']:,.0f}"
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
        sentence=unit_sentence(markdown_literal(row["unit_name"]), m, row, level, min_cases),
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


def unit_overview(cells: list[tuple[MeasureView, Cell]]) -> str:
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


def build_views(
    config: CycleConfig,
    results: list[MeasureResult],
    units: pd.DataFrame,
    addresses: dict[str, str],
    drawn: dict,
    funnels: dict[str, Funnel | None] | None = None,
) -> tuple[list[MeasureView], list[UnitView]]:
    """Format every number once; return the measure and unit views the templates lay out."""
    level = f"{config.reporting.interval * 100:g}%"
    measures: list[MeasureView] = []
    cells: dict[str, list[tuple[MeasureView, Cell]]] = {uid: [] for uid in units.index}
    for m in results:
        view = _measure_view(config, m, drawn, (funnels or {}).get(m.measure.key), level)
        for row in _ordered(m.table):
            cell = _cell(m, row, level, config.reporting.minimum_cases)
            view.rows.append(
                {
                    "name": markdown_literal(row["unit_name"]),
                    "href": f"units/{addresses[row['unit_id']]}.qmd",
                    "cell": cell,
                }
            )
            cells[row["unit_id"]].append((view, cell))
        measures.append(view)
    unit_views = [
        UnitView(
            id=markdown_literal(uid),
            name=markdown_literal(u["name"]),
            kind=markdown_literal(u["kind"]),
            href=f"units/{addresses[uid]}.qmd",
            figures=unit_figures(u["name"], addresses[uid], drawn),
            cells=cells[uid],
            overview=unit_overview(cells[uid]),
            measures_reported=sum(c.status == "reported" for _, c in cells[uid]),
            measures_listed=len(cells[uid]),
        )
        for uid, u in units.iterrows()
    ]
    return measures, unit_views


def _ordered(table: pd.DataFrame) -> list[pd.Series]:
    """A measure's rows in the order its page lists them: reported units by adjusted value,
    then too few cases, withheld, no cases."""
    ordered = table.sort_values(
        ["status", "rsr_median"],
        key=lambda s: (
            s.map({"reported": 0, "too_few": 1, "withheld": 2, "no_cases": 3})
            if s.name == "status"
            else s
        ),
    )
    return [row for _, row in ordered.iterrows()]


def _measure_view(
    config: CycleConfig, m: MeasureResult, drawn: dict, funnel: Funnel | None, level: str
) -> MeasureView:
    """One measure's page view, without its rows of units."""
    d = m.diagnostics
    coefs = [
        {
            "term": markdown_literal(term),
            "ratio": num(r["ratio"]),
            "interval": f"{num(r['lower'])} to {num(r['upper'])}",
        }
        for term, r in m.casemix.coefficients.iterrows()
    ]
    continuous = not family_for(m.measure).counts_events
    figures, funnel_words = measure_figures(m, drawn, funnel, level)
    reported = m.table["status"] == "reported"
    return MeasureView(
        key=m.measure.key,
        name=markdown_literal(m.measure.name),
        definition=markdown_literal(m.measure.definition),
        better=m.measure.better,
        href=f"measures/{m.measure.key}.qmd",
        model_href=f"models/{m.measure.key}.qmd",
        kind=m.measure.type,
        words=WORDS["continuous" if continuous else "binary"],
        figures=figures,
        funnel_words=funnel_words,
        patients=f"{m.casemix.patients:,}",
        events=f"{m.casemix.events:,.0f}"
        + (f" {markdown_literal(m.measure.unit_label)}" if continuous else ""),
        network_rate=value(m.measure, m.network_rate),
        benchmark=value(m.measure, m.benchmark),
        benchmark_is_network=config.reporting.benchmark == "network" or continuous,
        typical=""
        if m.typical != m.typical or value(m.measure, m.typical) == value(m.measure, m.benchmark)
        else value(m.measure, m.typical),
        c_statistic=num(m.casemix.c_statistic, 3)
        if not continuous and m.casemix.patients and m.casemix.c_statistic == m.casemix.c_statistic
        else "not applicable",
        units_in_fit=m.casemix.units_in_fit,
        formula=code_span(m.casemix.formula),
        tau=f"{num(m.tau[0])} ({num(m.tau[1])} to {num(m.tau[2])})",
        rhat=num(d.rhat_max, 3),
        ess=f"{d.ess_bulk_min:,.0f}",
        divergences=d.divergences,
        coefficients=coefs,
        sensitivity=_sensitivity_rows(m),
        targets=targets_view(m),
        count_note=count_note(m.table, config.reporting.hide_counts_below),
        units_listed=len(m.table),
        units_shown=int(reported.sum()),
        units_worse=int((reported & (m.table["group"] == "worse")).sum()),
        units_better=int((reported & (m.table["group"] == "better")).sum()),
    )


def _sensitivity_rows(m: MeasureResult) -> list[dict[str, str]]:
    """Per alternative prior for tau: how it was computed and the units whose group it changes."""
    return [
        {
            "prior": f"HalfNormal({alt['scale']:g})",
            "method": f"{alt['method']} (k-hat {alt['k_hat']:.2f})",
            "changed": "; ".join(
                f"{markdown_literal(name)}: {GROUPS[a].lower()} → {GROUPS[b].lower()}"
                for name, a, b in alt["changed"]
            )
            or "none",
            "count": str(len(alt["changed"])),
        }
        for alt in m.sensitivity
    ]


def targets_view(m: MeasureResult) -> dict | None:
    """What the methods and measure pages say about the predictors of what units are pulled
    towards."""
    t = m.targets
    if t is None:
        return None
    terms = [
        {
            "term": markdown_literal(target_words(x["term"])),
            "code": code_span(x["term"]),
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
            "name": markdown_literal(c.unit_name),
            "with": GROUPS[c.group_with].lower(),
            "without": GROUPS[c.group_without].lower(),
        }
        for c in t["changed"].itertuples()
    ]
    groups = {g: f"{n['with']} / {n['without']}" for g, n in t["groups"].items()}
    return {
        "words": markdown_literal(like_words([x["term"] for x in t["terms"]])),
        "terms": terms,
        "changed": changed,
        "groups": groups,
        "count": len(changed),
    }
