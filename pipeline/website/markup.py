"""Every number and piece of data text the pages show, formatted in one place.

Text from the data passes through :func:`markdown_literal` (markdown and HTML show it literally),
:func:`code_span` (an inline code span) or :func:`attribute_literal` (a quoted attribute value),
which make it literal in both Quarto (pandoc) and the built-in renderer.
"""

from __future__ import annotations

import re

import pandas as pd

from pipeline.config import family_for

_MD_SPECIAL = set("\\`*_{}[]()#+-.!|~^$@:\"'")


_ENTITIES = {"&": "&amp;", "<": "&lt;", ">": "&gt;"}


def markdown_literal(text: object) -> str:
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


def code_span(text: object) -> str:
    """Data text as an inline code span: shown literally, with no escapes visible.

    The fence is longer than any run of backticks inside; '|' is escaped for pipe tables.
    """
    body = " ".join(str(text).split()).replace("|", "\\|")
    fence = "`" * (max((len(run) for run in re.findall(r"`+", body)), default=0) + 1)
    return f"{fence} {body} {fence}"


def pct(x: float, digits: int = 1) -> str:
    return "" if pd.isna(x) else f"{x * 100:.{digits}f}%"


def span(lo: float, hi: float, digits: int = 1) -> str:
    return "" if pd.isna(lo) else f"{lo * 100:.{digits}f}% to {hi * 100:.{digits}f}%"


def value(measure, x: float) -> str:
    """An adjusted or raw value of ``measure``: a percentage for rates, the outcome's unit
    otherwise."""
    if not family_for(measure).counts_events:
        return "" if pd.isna(x) else f"{x:,.1f} {markdown_literal(measure.unit_label)}"
    return pct(x)


def value_span(measure, lo: float, hi: float) -> str:
    if not family_for(measure).counts_events:
        return (
            "" if pd.isna(lo) else f"{lo:,.1f} to {hi:,.1f} {markdown_literal(measure.unit_label)}"
        )
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


def attribute_literal(text: object) -> str:
    """Text for a quoted attribute value in both Quarto (pandoc) and the built-in renderer."""
    return " ".join(str(text).split()).replace("\\", "/").replace('"', "”")


def times_words(factor: float) -> str:
    """A factor in words: 0.5 -> 'half', 2 -> 'twice', 3 -> '3 times'."""
    return {0.5: "half", 2.0: "twice"}.get(float(factor), f"{factor:g} times")
