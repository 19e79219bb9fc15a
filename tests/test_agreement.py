"""Every number on the demo site agrees with the downloads and with the other numbers on its page.

The pages are read back as a reader sees them (text of the HTML tables and sentences), the numbers
parsed, and compared with ``downloads/results.csv`` and ``results.json`` within the rounding shown.
Relations checked as well as values: O/E = observed / expected, adjusted = ratio x benchmark,
the funnel's points = O/E x benchmark with "inside/above/below" following its own limits, the
raw-to-adjusted move = adjusted - raw, and a binary measure's expected counts adding up to the
benchmark rate times the network's patients (indirect standardisation; common practice, no source).
"""

from __future__ import annotations

import html as html_lib
import json
import re

import pandas as pd
import pytest

from pipeline.results import GROUPS
from pipeline.website import readability

from .conftest import demo_counts

pytestmark = pytest.mark.slow

GROUP_WORDS = {v: k for k, v in GROUPS.items()}


def tables(page: str) -> dict[tuple[str, ...], list[list[str]]]:
    """Each table of a page as header -> rows of cell text."""
    out = {}
    for t in re.findall(r"<table.*?</table>", page, re.S):
        rows = [
            [
                html_lib.unescape(re.sub(r"<[^>]+>", "", c)).strip()
                for c in re.findall(r"<t[hd][^>]*>(.*?)</t[hd]>", r, re.S)
            ]
            for r in re.findall(r"<tr.*?</tr>", t, re.S)
        ]
        out[tuple(rows[0])] = rows[1:]
    return out


def table_with(page: str, *heads: str) -> list[dict[str, str]]:
    """The smallest table whose column heads contain each of ``heads``, as one dict per row."""
    found = [
        (header, rows)
        for header, rows in tables(page).items()
        if all(any(h in c for c in header) for h in heads)
    ]
    assert found, f"no table with columns {heads}"
    header, rows = min(found, key=lambda f: len(f[0]))
    return [dict(zip(header, r, strict=True)) for r in rows]


def col(row: dict[str, str], head: str) -> str:
    """The cell whose column head starts with ``head`` ("Observed total", "Adjusted rate", ...)."""
    return next(v for c, v in row.items() if c.startswith(head))


def number(text: str) -> float:
    m = re.search(r"-?[\d,]*\.?\d+", text)
    assert m, text
    return float(m.group().replace(",", ""))


def numbers(text: str) -> list[float]:
    return [float(x.replace(",", "")) for x in re.findall(r"-?[\d,]*\.?\d+", text)]


def close(shown: str | float, true: float, step: float) -> bool:
    """``shown`` (text or number) is ``true`` rounded to ``step``."""
    x = number(shown) if isinstance(shown, str) else shown
    return abs(x - true) <= step / 2 + 1e-9


def chance_ok(shown: str, p: float) -> bool:
    if shown == "less than 1%":
        return p < 0.01
    if shown == "more than 99%":
        return p > 0.99
    return 0.01 <= p <= 0.99 and close(shown, p * 100, 1)


def step(m: dict) -> float:
    """Rounding of expected counts in the results tables: events to 0.1, continuous totals to 1."""
    return 0.1 if m["type"] == "binary" else 1.0


def scale(kind: str) -> float:
    # continuous values in the outcome's unit, rates in %
    return 1.0 if kind == "continuous" else 100.0


def hidden_count(r) -> bool:
    return r.get("count_status") in ("small", "protects")


def assert_count_hidden(shown: dict[str, str], r, where) -> None:
    """A row whose count is hidden: the range of the download in the Observed cell, and no raw rate,
    O/E or own data."""
    for column in ("observed", "raw_rate", "oe_ratio", "own_weight"):
        assert pd.isna(r[column]), (where, column)
    observed = col(shown, "Observed")
    if r["count_status"] == "small":
        assert numbers(observed) == [r["observed_low"], r["observed_high"]], (where, observed)
        assert 1 <= r["observed_low"] <= r["observed_high"] <= r["cases"] - 1
    else:
        assert observed == "not shown" and pd.isna(r["observed_low"]), (where, observed)
    for head, cell in shown.items():
        if head.startswith(("Raw", "O/E", "Own data")):
            assert cell == "", (where, head, cell)


@pytest.fixture(scope="module")
def published(demo_cycle):
    _, _, site = demo_cycle
    csv = pd.read_csv(site / "downloads" / "results.csv")
    measures_about = {
        m["key"]: m
        for m in json.loads((site / "downloads" / "results.json").read_text())["measures"]
    }
    return site, csv, measures_about


def test_measure_pages_agree_with_the_downloads(published):
    site, csv, measures_about = published
    for key, m in measures_about.items():
        page = (site / "measures" / f"{key}.html").read_text()
        k = scale(m["type"])
        rows = csv[(csv["measure"] == key) & (csv["status"] == "reported")].set_index("unit_name")
        bench = m["benchmark"]

        full = {
            r["Unit"]: r
            for r in table_with(page, "Observed", "Expected", "O/E", "Group", "Own data")
        }
        assert set(rows.index) <= set(full), key
        for name, r in rows.iterrows():
            shown = full[name]
            assert number(shown["Cases"]) == r["cases"], (key, name)
            assert close(col(shown, "Expected"), r["expected"], step(m)), (
                key,
                name,
                shown["Expected"],
            )
            if not hidden_count(r):
                assert close(col(shown, "Observed"), r["observed"], 1), (key, name)
                assert close(shown["O/E"], r["oe_ratio"], 0.01) and r["oe_ratio"] == pytest.approx(
                    r["observed"] / r["expected"], rel=1e-4
                )
            # the small-count rule: the page says what the download says, and nothing that gives the
            # count back
            else:
                assert_count_hidden(shown, r, (key, name))
            adjusted, interval = col(shown, "Adjusted"), col(shown, "95% interval")
            assert close(adjusted, r["rsr_median"] * k, 0.1), (key, name)
            lo, hi = numbers(interval)[:2]
            assert close(lo, r["rsr_lower"] * k, 0.1) and close(hi, r["rsr_upper"] * k, 0.1), (
                key,
                name,
            )
            assert GROUP_WORDS[shown["Group"].split(" ", 1)[1]] == r["group"], (key, name)
            assert chance_ok(shown["Chance on the other side"], r["prob_other_side"]), (key, name)
            ranks = numbers(shown["Rank"])  # a median rank can end in .5 and is shown rounded
            assert close(ranks[0], r["rank_median"], 1) and ranks[1:] == [
                r["rank_lower"],
                r["rank_upper"],
            ], (key, name)
            if not hidden_count(r):
                assert close(shown["Own data"], r["own_weight"] * 100, 1)
            # One benchmark: adjusted = ratio x benchmark, draw by draw, so for the medians too.
            assert r["rsr_median"] == pytest.approx(r["ratio_median"] * bench, rel=1e-4)

        chart = {r["Unit"]: r for r in table_with(page, "Unit", "Adjusted", "interval", "Group")}
        assert set(chart) == set(rows.index), key
        for name, r in rows.iterrows():
            assert close(chart[name]["Adjusted"], r["rsr_median"] * k, 0.1)
            assert GROUP_WORDS[chart[name]["Group"]] == r["group"]

        # units whose count is hidden are left out of both figures
        counted = rows[~rows.apply(hidden_count, axis=1)]
        moves = {r["Unit"]: r for r in table_with(page, "Unit", "Raw", "Adjusted", "Move")}
        assert set(moves) == set(counted.index), key
        for name, r in counted.iterrows():
            mv = moves[name]
            assert close(mv["Raw"], r["raw_rate"] * k, 0.1) and close(
                mv["Adjusted"], r["rsr_median"] * k, 0.1
            )
            assert (
                abs(number(mv["Move"]) - (number(mv["Adjusted"]) - number(mv["Raw"]))) <= 0.1 + 1e-9
            ), (key, name)

        funnel = {r["Unit"]: r for r in table_with(page, "Value from O/E", "99.8% limits")}
        assert set(funnel) == set(counted.index), key
        outside = 0
        for name, r in counted.iterrows():
            f = funnel[name]
            value = r["oe_ratio"] * bench * k
            assert close(f["Value from O/E"], value, 0.1), (key, name)
            assert close(f["Expected"], r["expected"], 0.1), (key, name)
            lo95, hi95 = numbers(f["95% limits"])
            lo998, hi998 = numbers(f["99.8% limits"])
            assert 0 <= lo998 <= lo95 <= bench * k + 0.05 <= hi95 + 0.1 <= hi998 + 0.1, (
                key,
                name,
                f,
            )
            verdict = f["Against the 99.8% limits"]
            assert verdict in ("inside", "above", "below")
            # The verdict follows the unrounded limits; the rounded ones shown must not contradict
            # it.
            if verdict == "above":
                assert number(f["Value from O/E"]) >= hi998 - 0.1
            elif verdict == "below":
                assert number(f["Value from O/E"]) <= lo998 + 0.1
            else:
                assert lo998 - 0.1 <= number(f["Value from O/E"]) <= hi998 + 0.1
            outside += verdict != "inside"
        text = " ".join(readability.prose(page))
        said = re.search(r"(\d+) of (\d+) units are outside the outer \(99\.8%\) limits", text)
        assert said and int(said.group(1)) == outside and int(said.group(2)) == len(counted), (
            key,
            said and said.group(0),
        )

        # The benchmark and the typical unit, as stated in words.
        bench_shown = re.search(
            r"[Ee]ach unit is compared with this (?:rate|mean|average), the "
            r"benchmark|benchmark is ([\d.,]+)",
            text,
        )
        assert bench_shown, key
        stated = re.search(
            r"typical unit's adjusted value is ([\d.,]+)[^,]*, while the benchmark is ([\d.,]+)",
            text,
        )
        predictors = m["pulled_towards"]["predictors"]
        if "pulls a small unit towards units like it" in text:
            assert predictors, key  # the words say predictors are used only when they are
            changed = m["pulled_towards"]["units_whose_group_depends_on_the_predictors"]
            said = re.search(
                r"For (\d+) units?, the group would differ with one typical unit for all", text
            )
            assert (int(said.group(1)) if said else 0) == len(changed), key
            group_of = csv[csv["measure"] == key].set_index("unit_id")["group"]
            # each such unit's group, as published, is the fit with the predictors
            for c in changed:
                assert group_of[c["unit_id"]] == c["with"] != c["without"], (key, c)
        elif stated:
            assert close(stated.group(1), m["typical_unit"] * k, 0.1) and close(
                stated.group(2), bench * k, 0.1
            )
        else:
            # not stated only when it rounds to the benchmark
            assert f"{m['typical_unit'] * k:.1f}" == f"{bench * k:.1f}", key


def test_binary_expected_counts_add_up_to_the_benchmark(published):
    _, csv, measures_about = published
    for key, m in measures_about.items():
        rows = csv[csv["measure"] == key]
        if m["type"] != "binary" or rows["status"].ne("reported").any():
            continue  # withheld units' counts are not published, so the total cannot be rebuilt
        assert rows["expected"].sum() == pytest.approx(m["benchmark"] * m["patients"], rel=1e-4), (
            key
        )
        assert rows["observed"].sum() == pytest.approx(m["events"]), key


def test_hidden_counts_add_up_with_the_shown_ones_to_the_network_total(demo_cycle, published):
    """Counts shown plus the true hidden counts are the network's published total; each true count
    is in its range."""
    files, _, _ = demo_cycle
    _, csv, measures_about = published
    counts = demo_counts(files.config.parent).set_index(["measure", "unit_id"])["observed"]
    for key, m in measures_about.items():
        if m["type"] != "binary":
            continue
        rows = csv[csv["measure"] == key].set_index("unit_id")
        true = counts.loc[key]
        shown = rows["count_status"] == "shown"
        assert rows.loc[shown, "observed"].sum() + true[rows.index[~shown]].sum() == m["events"], (
            key
        )
        assert (rows.loc[shown, "observed"] == true[rows.index[shown]]).all(), key
        small = rows[rows["count_status"] == "small"]
        assert (
            (small["observed_low"] <= true[small.index])
            & (true[small.index] <= small["observed_high"])
        ).all(), key
        # the demo's threshold
        assert ((true[small.index] < 11) | (small["cases"] - true[small.index] < 11)).all(), key
        big = rows[shown & (rows["status"] == "reported")]
        assert not (
            (big["observed"].between(1, 10)) | (big["cases"] - big["observed"]).between(1, 10)
        ).any(), key


def test_unit_pages_agree_with_the_downloads(published):
    site, csv, measures_about = published
    for unit_id, rows in csv[csv["status"] == "reported"].groupby("unit_id"):
        page = (site / "units" / f"{unit_id}.html").read_text()
        text = " ".join(readability.prose(page))
        numbers_table = {
            r["Measure"]: r for r in table_with(page, "Measure", "Cases", "Observed", "Own data")
        }
        strip = {r["Measure"]: r for r in table_with(page, "Measure", "Interval", "Group")}
        starts = sorted(
            text.index(measures_about[k]["name"] + ". Allowing") for k in rows["measure"]
        )
        for _, r in rows.iterrows():
            m = measures_about[r["measure"]]
            k = scale(m["type"])
            name = m["name"]
            row = numbers_table[name]
            assert number(row["Cases"]) == r["cases"] and close(
                row["Expected"], r["expected"], step(m)
            ), (unit_id, name)
            if hidden_count(r):
                assert_count_hidden(row, r, (unit_id, name))
            else:
                assert close(row["Observed"], r["observed"], 1), (unit_id, name)
            adjusted = col(row, "Adjusted")
            assert close(adjusted, r["rsr_median"] * k, 0.1), (unit_id, name)
            assert close(row["Ratio to the benchmark"], r["ratio_median"], 0.01), (unit_id, name)
            assert GROUP_WORDS[row["Group"].split(" ", 1)[1]] == r["group"]
            # The strip chart's table: the ratio and its interval, against a benchmark of 1.
            s = strip[name]
            assert close(s["Ratio to the benchmark"], r["ratio_median"], 0.01)
            lo, hi = numbers(s["Interval"])[:2]
            assert close(lo, r["ratio_lower"], 0.01) and close(hi, r["ratio_upper"], 0.01)
            # The sentence about this measure.
            start = text.index(name + ". Allowing")
            words = text[start : next((i for i in starts if i > start), start + 1200)]
            between = re.search(r"between ([\d.,]+)%?(?: days)? and ([\d.,]+)", words)
            assert (
                between
                and close(between.group(1), r["rsr_lower"] * k, 0.1)
                and close(between.group(2), r["rsr_upper"] * k, 0.1)
            ), (unit_id, words)
            if r["count_status"] == "small":
                assert (
                    f"Between {r['observed_low']:,.0f} and {r['observed_high']:,.0f} of its "
                    f"{r['cases']:,.0f} patients had this outcome." in words
                )
            elif r["count_status"] == "protects":
                assert "Its exact number of patients with this outcome is not shown" in words
            bench = re.search(r"(?:benchmark|network average) is ([\d.,]+)", words)
            assert bench and close(bench.group(1), m["benchmark"] * k, 0.1), (unit_id, words)
            above = re.search(
                r"above (?:the benchmark|it) is (less than 1%|more than 99%|\d+%)", words
            )
            assert above and chance_ok(above.group(1), r["prob_above_benchmark"]), (unit_id, words)
            assert GROUPS[r["group"]].lower().replace("stands out as ", "") in words.lower(), (
                unit_id,
                words,
            )
            depends = {
                c["unit_id"]: c["without"]
                for c in m["pulled_towards"].get("units_whose_group_depends_on_the_predictors", [])
            }
            if unit_id in depends:
                assert f"it would be {GROUPS[depends[unit_id]].lower()}." in words, (unit_id, words)
            else:
                assert "Its group depends on a choice in the model" not in words, (unit_id, words)


def test_methods_page_predictors_and_sensitivity_agree_with_the_downloads(published):
    site, csv, measures_about = published
    page = (site / "methods.html").read_text()
    targeted = {k: m for k, m in measures_about.items() if m["pulled_towards"]["predictors"]}
    if not targeted:
        assert "What small units are pulled towards</strong> (unit-level predictors" not in page
        return
    names = {m["name"]: k for k, m in targeted.items()}
    effects = table_with(page, "Measure", "Predictor", "Effect per SD")
    assert len(effects) == sum(len(m["pulled_towards"]["predictors"]) for m in targeted.values())
    for row in effects:
        m = targeted[names[row["Measure"]]]
        term = next(
            t for t in m["pulled_towards"]["predictors"] if f"({t['term']})" in row["Predictor"]
        )
        median, lo, hi = numbers(col(row, "Effect per SD"))[:3]
        assert (
            close(median, term["effect_median"], 0.01)
            and close(lo, term["effect_lower"], 0.01)
            and close(hi, term["effect_upper"], 0.01)
        )
        assert lo <= median <= hi
    sensitivity = table_with(page, "Measure", "Units whose group changes", GROUPS["better"])
    for row in sensitivity:
        if row["Measure"] not in names:
            continue
        m = targeted[names[row["Measure"]]]
        for g in ("better", "typical", "worse"):
            shown = numbers(row[GROUPS[g]])
            assert shown == [
                m["pulled_towards"]["groups"][g]["with"],
                m["pulled_towards"]["groups"][g]["without"],
            ], (row, g)
            published = csv[
                (csv["measure"] == names[row["Measure"]]) & (csv["status"] == "reported")
            ]
            # the published groups are the fit with the predictors
            assert shown[0] == (published["group"] == g).sum()
        assert number(row["Units whose group changes"]) == len(
            m["pulled_towards"]["units_whose_group_depends_on_the_predictors"]
        )
