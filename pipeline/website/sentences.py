"""The plain-language sentences of the measure and unit pages."""

from __future__ import annotations

import pandas as pd

from pipeline.config import family_for
from pipeline.results import GROUPS, MeasureResult
from pipeline.website.markup import chance, natural_frequency, pct, value

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


def unit_sentence(name: str, m: MeasureResult, row: pd.Series, level: str, min_cases: int) -> str:
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
        + target_sentence(m, row)
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


def target_sentence(m: MeasureResult, row: pd.Series) -> str:
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
    if not family_for(m.measure).counts_events:
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


def observed_words(row: pd.Series, count: str) -> str:
    """The observed count as published: the number, its range when small, or "not shown" when it
    protects another."""
    if count == "shown":
        return f"{row['observed']:,.0f}"
    if count == "small":
        return f"{row['observed_low']:,.0f} to {row['observed_high']:,.0f}"
    return "not shown" if count == "protects" else ""
