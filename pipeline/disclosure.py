"""Disclosure control: small counts shown as ranges, and no hidden count that adds back up from what
is shown.

Two rules act on one measure's results table, in place, before anything is formatted:

* **Units** (``protect_units``): a unit with fewer than ``minimum`` cases is ``too_few``. The
  network total of patients is published, so the hidden units' cases can be worked out by
  subtraction; while that sum pins any hidden unit to one value, or fewer than two units (or
  fewer than ``minimum`` cases) are hidden, the smallest reported unit is ``withheld`` too.
* **Counts** (``hide_small_counts``, binary measures): on a reported unit, a count of patients
  with the outcome from 1 to ``threshold - 1``, or of patients without it, is a small count. Its
  event count, raw rate, O/E and own-data weight (each of which gives the count back, with the
  published cases, expected count or between-unit SD) are left empty, and the count is published
  as a range (:func:`band`). Zero is shown (common practice for small-number rules, from memory).
  The network's event total is published too, so while the hidden counts' sum pins any of them
  to one value other than zero, the smallest other count of at least ``threshold`` is hidden as
  well (its range is not published: it ``protects`` the small one). A count pinned to zero says
  what a shown zero says, and zeros are shown.

"Pins" is decided by :func:`feasible`, an exact audit of one linear equation (hidden values add up
to a known total) over integer values with the ranges a reader can know from the published rule:
a small count lies in its band, a hidden protecting count is at least ``threshold`` and at most
the smallest count still shown, a ``too_few`` unit has 1 to ``minimum - 1`` cases, and a
``withheld`` unit at least ``minimum`` and at most the smallest unit still shown. Model-based
values (adjusted rates, intervals, probabilities, ranks) stay published: they are what the
report is for, and each blends the unit's count with the network's.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline.errors import InputError, Problem

COUNT_STATUS = {
    "shown": "Shown",
    "small": "Small count, shown as a range",
    "protects": "Not shown, so that a small count cannot be worked out",
}
# each gives the count back; hidden with it
WITH_COUNT = ["observed", "raw_rate", "oe_ratio", "own_weight"]
NEVER = 10**15  # "no upper bound" in an integer range

Ranges = list[tuple[int, int]]  # sorted, disjoint, inclusive integer ranges


def _merge(pieces) -> Ranges:
    out: Ranges = []
    for lo, hi in sorted(p for p in pieces if p[0] <= p[1]):
        if out and lo <= out[-1][1] + 1:
            out[-1] = (out[-1][0], max(out[-1][1], hi))
        else:
            out.append((lo, hi))
    return out


def _add(a: Ranges, b: Ranges) -> Ranges:
    return _merge((min(x0 + y0, NEVER), min(x1 + y1, NEVER)) for x0, x1 in a for y0, y1 in b)


def _intersect(a: Ranges, b: Ranges) -> Ranges:
    return _merge((max(x0, y0), min(x1, y1)) for x0, x1 in a for y0, y1 in b)


def feasible(ranges: list[Ranges], total: int) -> list[Ranges]:
    """Every value each hidden number can take, given its range and that all of them add up to
    ``total``."""
    n = len(ranges)
    prefix: list[Ranges] = [[(0, 0)]]
    for r in ranges[:-1]:
        prefix.append(_add(prefix[-1], r))
    out: list[Ranges] = [[] for _ in range(n)]
    suffix: Ranges = [(0, 0)]
    for i in range(n - 1, -1, -1):
        others = _add(prefix[i], suffix)
        out[i] = _intersect(ranges[i], _merge((total - hi, total - lo) for lo, hi in others))
        suffix = _add(suffix, ranges[i])
    return out


def pinned(ranges: list[Ranges]) -> list[int]:
    """Positions whose feasible values are a single number (recovered exactly)."""
    return [i for i, r in enumerate(ranges) if len(r) == 1 and r[0][0] == r[0][1]]


def small(cases, observed, threshold: int):
    """True where the count with the outcome, or without it, is from 1 to ``threshold - 1``."""
    cases, observed = np.asarray(cases, float), np.asarray(observed, float)
    rest = cases - observed
    return ((observed > 0) & (observed < threshold)) | ((rest > 0) & (rest < threshold))


def band(cases: int, observed: int, threshold: int) -> tuple[int, int]:
    """The range a small count is published as.

    With at least ``2 * threshold - 1`` cases a low count lies in 1 to threshold - 1 and a high one
    (few patients without the outcome) in cases - threshold + 1 to cases - 1; with fewer cases the
    two overlap and every small count is published as 1 to cases - 1, so the range never says
    more than the rule does.
    """
    if cases >= 2 * threshold - 1:
        return (1, threshold - 1) if observed < threshold else (cases - threshold + 1, cases - 1)
    return 1, cases - 1


def protect_units(table: pd.DataFrame, minimum: int) -> None:
    """Withhold the smallest reported units until no hidden unit's cases can be worked out (in
    place)."""
    while True:
        hidden = table["status"].isin(["too_few", "withheld"])
        reported = table[table["status"] == "reported"]
        if not hidden.any() or reported.empty:
            return
        enough = hidden.sum() >= 2 and table.loc[hidden, "cases"].sum() >= minimum
        if enough and not pinned(_unit_ranges(table, minimum)):
            return
        table.loc[reported.sort_values(["cases", "unit_id"]).index[0], "status"] = "withheld"


def _unit_ranges(table: pd.DataFrame, minimum: int) -> list[Ranges]:
    hidden = table[table["status"].isin(["too_few", "withheld"])]
    reported = table.loc[table["status"] == "reported", "cases"]
    top = int(reported.min()) if len(reported) else NEVER
    ranges = [[(1, minimum - 1)] if s == "too_few" else [(minimum, top)] for s in hidden["status"]]
    return feasible(ranges, int(hidden["cases"].sum()))


def hide_small_counts(table: pd.DataFrame, threshold: int, minimum: int) -> None:
    """Apply the small-count rule to a binary measure's table (in place); ``threshold`` 0 shows
    every count.

    Adds ``count_status`` (COUNT_STATUS) and the published range ``observed_low``/``observed_high``
    of small counts, and empties WITH_COUNT wherever a count is not shown.
    """
    table["count_status"] = np.where(table["status"] == "reported", "shown", "")
    table["observed_low"], table["observed_high"] = np.nan, np.nan
    if threshold:
        where = (table["status"] == "reported") & small(
            table["cases"], table["observed"], threshold
        )
        table.loc[where, "count_status"] = "small"
        for i in table.index[where]:
            table.loc[i, ["observed_low", "observed_high"]] = band(
                int(table.at[i, "cases"]), int(table.at[i, "observed"]), threshold
            )
        while _given_back(count_ranges(table, threshold, minimum)):
            pool = table[(table["count_status"] == "shown") & (table["observed"] >= threshold)]
            if pool.empty:
                raise InputError(
                    [
                        Problem(
                            f"measure '{table['measure'].iloc[0]}'",
                            "the small-count rule cannot hide its small counts: every other "
                            "count is zero or small too, so the network total would give them "
                            "back. Nothing was published. Raise "
                            "[reporting].minimum_cases, or pool periods so that counts are larger.",
                        )
                    ]
                )
            table.loc[
                pool.sort_values(["observed", "cases", "unit_id"]).index[0], "count_status"
            ] = "protects"
    table.loc[table["status"] != "reported", WITH_COUNT] = np.nan
    table.loc[table["count_status"].isin(["small", "protects"]), WITH_COUNT] = np.nan


def _given_back(ranges: list[Ranges]) -> list[int]:
    """Hidden counts pinned to one value other than zero (zeros are shown by the rule, so a pinned
    zero tells nothing new)."""
    return [i for i in pinned(ranges) if ranges[i] != [(0, 0)]]


def count_ranges(table: pd.DataFrame, threshold: int, minimum: int) -> list[Ranges]:
    """What a reader can know of every hidden event count of a measure (feasible values under the
    network total)."""
    hidden = table[
        (table["status"].isin(["too_few", "withheld"]))
        | table["count_status"].isin(["small", "protects"])
    ]
    if hidden.empty:
        return []
    shown = table[table["count_status"] == "shown"]
    cap = shown.loc[shown["observed"] >= threshold, "observed"]
    cap_value = int(cap.min()) if len(cap) else NEVER
    reported = table.loc[table["status"] == "reported", "cases"]
    top_cases = int(reported.min()) if len(reported) else NEVER
    ranges: list[Ranges] = []
    for row in hidden.itertuples():
        if row.status == "too_few":
            ranges.append([(0, minimum - 1)])
        elif row.status == "withheld":
            ranges.append([(0, top_cases)])
        elif row.count_status == "small":
            ranges.append([(int(row.observed_low), int(row.observed_high))])
        else:  # protects: a count that was not small, at most the smallest count still shown
            c = int(row.cases)
            ranges.append(
                _intersect(_merge([(threshold, c - threshold), (c, c)]), [(threshold, cap_value)])
            )
    return feasible(ranges, int(round(hidden["observed"].sum())))


def planned(
    cases: pd.Series, observed: pd.Series, unit_ids, binary: bool, threshold: int, minimum: int
) -> dict[str, int]:
    """What the two rules will hide for one measure, from its counts per unit (for ``fairgauge
    check``).

    ``cases`` and ``observed`` are indexed by unit id; units of ``unit_ids`` without rows have no
    cases.
    """
    ids = pd.Index(unit_ids)
    table = pd.DataFrame(
        {
            "measure": "",
            "unit_id": ids,
            "cases": cases.reindex(ids).fillna(0).to_numpy(int),
            "observed": observed.reindex(ids).fillna(0).to_numpy(float),
        }
    )
    table["status"] = np.select(
        [table["cases"] == 0, table["cases"] < minimum], ["no_cases", "too_few"], "reported"
    )
    protect_units(table, minimum)
    for column in WITH_COUNT[1:]:
        table[column] = np.nan
    hide_small_counts(table, threshold if binary else 0, minimum)
    return {
        "units": int(table["status"].isin(["too_few", "withheld"]).sum()),
        "small": int((table["count_status"] == "small").sum()),
        "protects": int((table["count_status"] == "protects").sum()),
    }
