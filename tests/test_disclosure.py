"""The small-count rule and its audit (pipeline/disclosure.py), checked against brute force."""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest

from pipeline.disclosure import band, feasible, hide_small_counts, pinned, small


def _brute(ranges, total):
    """Every value each variable takes in some solution, by enumerating all combinations."""
    values = [sorted({v for lo, hi in r for v in range(lo, hi + 1)}) for r in ranges]
    seen = [set() for _ in ranges]
    for combo in itertools.product(*values):
        if sum(combo) == total:
            for i, v in enumerate(combo):
                seen[i].add(v)
    return seen


def _expand(ranges):
    return {v for lo, hi in ranges for v in range(lo, hi + 1)}


def test_the_audit_finds_exactly_the_values_brute_force_finds():
    rng = np.random.default_rng(7)
    tried = 0
    for _ in range(300):
        n = int(rng.integers(1, 5))
        ranges = []
        for _ in range(n):
            pieces = []
            for _ in range(int(rng.integers(1, 3))):
                lo = int(rng.integers(0, 15))
                pieces.append((lo, lo + int(rng.integers(0, 6))))
            ranges.append(sorted(pieces))
        brute_values = [sorted(_expand(r)) for r in ranges]
        total = sum(int(rng.choice(v)) for v in brute_values) + int(rng.integers(-1, 2))
        got = feasible([sorted(r) for r in ranges], total)
        assert [_expand(g) for g in got] == _brute(ranges, total), (ranges, total)
        tried += 1
    assert tried == 300


def test_a_lone_hidden_count_is_pinned_and_two_in_wide_ranges_are_not():
    assert pinned(feasible([[(1, 10)]], 4)) == [0]
    assert pinned(feasible([[(1, 10)], [(1, 10)]], 7)) == []
    assert pinned(feasible([[(1, 10)], [(1, 10)]], 2)) == [0, 1]  # both must be 1


def test_small_counts_and_their_ranges():
    assert small([60, 60, 60, 60, 60], [0, 1, 10, 11, 55], 11).tolist() == [
        False,
        True,
        True,
        False,
        True,
    ]
    assert small([60], [60], 11).tolist() == [False]  # every patient: nobody without it to protect
    assert band(60, 3, 11) == (1, 10) and band(60, 55, 11) == (50, 59)
    # With fewer than 21 cases a low and a high small count overlap, so both get the whole span.
    assert band(15, 3, 11) == (1, 14) and band(15, 12, 11) == (1, 14)
    # a band is never narrower than the rule itself: no range gives the count away
    for cases in range(11, 40):
        for observed in range(cases + 1):
            if small([cases], [observed], 11)[0]:
                lo, hi = band(cases, observed, 11)
                assert lo <= observed <= hi and hi - lo >= 9, (cases, observed)


def _table(cases, observed, status=None):
    n = len(cases)
    return pd.DataFrame(
        {
            "measure": "m",
            "unit_id": [f"u{i}" for i in range(n)],
            "status": status or ["reported"] * n,
            "cases": cases,
            "observed": np.array(observed, float),
            "expected": np.array(observed, float) + 0.5,
            "raw_rate": np.array(observed, float) / np.array(cases),
            "oe_ratio": 1.0,
            "own_weight": 0.5,
        }
    )


def test_one_small_count_gets_a_protecting_count_so_the_total_gives_nothing_back():
    t = _table([100, 200, 300, 400], [4, 30, 25, 90])
    hide_small_counts(t, 11, 11)
    assert t["count_status"].tolist() == ["small", "shown", "protects", "shown"]
    assert t.loc[0, ["observed_low", "observed_high"]].tolist() == [1, 10]
    assert t.loc[[0, 2], ["observed", "raw_rate", "oe_ratio", "own_weight"]].isna().all().all()
    assert t.loc[[1, 3], "observed"].tolist() == [30, 90]


def test_no_small_count_and_no_hidden_unit_hides_nothing():
    t = _table([100, 200], [0, 30])  # zero is shown
    hide_small_counts(t, 11, 11)
    assert t["count_status"].tolist() == ["shown", "shown"] and t["observed"].notna().all()


def test_a_network_where_only_small_counts_exist_cannot_be_published():
    from pipeline.errors import InputError

    t = _table([100, 200, 300], [4, 0, 0])
    with pytest.raises(InputError, match="cannot hide its small counts"):
        hide_small_counts(t, 11, 11)


def test_the_rule_off_shows_every_count():
    t = _table([100, 200], [4, 30])
    hide_small_counts(t, 0, 11)
    assert t["count_status"].tolist() == ["shown", "shown"] and t["observed"].tolist() == [4, 30]


def test_a_hidden_count_worked_out_to_be_zero_needs_no_protection():
    # The network total says the unit too small to show had no patient with the outcome: what a
    # shown zero says.
    t = _table([5, 100, 200], [0, 30, 40], status=["too_few", "reported", "reported"])
    hide_small_counts(t, 11, 11)
    assert t["count_status"].tolist() == ["", "shown", "shown"]
    # A measure on which no unit is reported at all is not an error either.
    t = _table([3, 3], [1, 2], status=["too_few", "too_few"])
    hide_small_counts(t, 11, 11)
    assert t["count_status"].tolist() == ["", ""] and t["observed"].isna().all()
