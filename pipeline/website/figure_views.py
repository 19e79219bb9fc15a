"""The figures of a measure page and a unit page, each with its words and table (captions.py)."""

from __future__ import annotations

from pipeline.config import family_for
from pipeline.results import MeasureResult
from pipeline.website import captions
from pipeline.website.captions import FigureView
from pipeline.website.figure_data import axis, measure_figure_path, png_of, unit_figure_path
from pipeline.website.funnel import Funnel, outside
from pipeline.website.markup import markdown_literal


def if_drawn(path: str, drawn: dict) -> str:
    return path if path in drawn else ""


def measure_figures(
    m: MeasureResult, drawn: dict, f: Funnel | None, level: str
) -> tuple[list[FigureView], str]:
    """The measure's pictures (intervals, funnel, movement) with their words and tables; and the
    funnel in a sentence."""
    k = axis(m)[0]
    unit = (
        markdown_literal(m.measure.unit_label) if not family_for(m.measure).counts_events else "%"
    )
    fmt = (
        (lambda x: f"{x:,.1f} {unit}")
        if not family_for(m.measure).counts_events
        else (lambda x: f"{x:.1f}%")
    )
    bench = fmt(m.benchmark * k)
    out = []
    path = measure_figure_path(m.measure.key, "intervals")
    if path in drawn:
        out.append(
            captions.intervals(
                path,
                if_drawn(png_of(path), drawn),
                drawn[path],
                fmt,
                lambda lo, hi: f"{fmt(lo)} to {fmt(hi)}",
                bench,
                level,
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
                    if_drawn(png_of(path), drawn),
                    drawn[path],
                    fmt,
                    bench,
                    counts,
                    f.phi,
                    f.widened,
                )
            )
        words = _funnel_words(f, counts)
    path = measure_figure_path(m.measure.key, "movement")
    if path in drawn:
        points_word = "percentage points" if family_for(m.measure).counts_events else unit
        out.append(captions.movement(path, "", drawn[path], fmt, bench, points_word))
    return out, words


def unit_figures(name: str, address: str, drawn: dict) -> list[FigureView]:
    out = []
    path = unit_figure_path(address, "position")
    if path in drawn:
        out.append(captions.position(path, drawn[path], name))
    path = unit_figure_path(address, "trend")
    if path in drawn:
        out.append(captions.trend(path, drawn[path], name))
    return out


def _funnel_words(f: Funnel, counts: dict) -> str:
    """The funnel plot in a sentence: units outside its limits, and the spread between units."""
    spread = (
        "about what chance alone would give"
        if f.phi < 1.5
        else f"{f.phi:.1f} times what chance alone would give"
    )
    return (
        f"In the funnel plot, {counts['998']} of {counts['units']} units are outside the "
        f"outer (99.8%) limits and {counts['95']} are outside the inner (95%) limits. "
        f"The spread between units is {spread}. "
        + (
            "The limits were widened to allow for it."
            if f.widened
            else "The limits were not widened for it."
        )
    )
