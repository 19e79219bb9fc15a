"""Quick tests of the stages after the shrinkage fit (results, downloads, figures, pages, render,
history) on a small invented network, with the fake sampler (tests/fake_sampler.py) in place of
the real one. Invariants only: the numbers are the fake's, not the model's."""

from __future__ import annotations

import json
import re
import textwrap
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from pipeline.config import load_config
from pipeline.cycle import run_cycle
from pipeline.downloads import NUMERIC_PUBLIC, public_table
from pipeline.invented import invent_network

from .fake_sampler import fake_run

CONFIG = """
[cycle]
title = "Quick network (invented)"
publisher = "Test publisher"
period = "{period}"
output = "site"
renderer = "builtin"
history = "history"

[inputs]
cohort = "cohort.csv"
units = "units.csv"
unit_column = "unit_id"
record_column = "stay_id"

[reporting]
minimum_cases = 11
hide_counts_below = 11

[sampler]
chains = 2
draws = 200
tune = 200
seed = 5

[[measures]]
key = "readmit30"
name = "Readmission"
definition = "Readmitted within 30 days (invented)."
outcome = "readmit30"
casemix = "C(age_band) + emergency"
pull_towards = ["log_cases"]

[[measures]]
key = "stay"
name = "Length of stay"
definition = "Days in hospital (invented)."
outcome = "los_days"
type = "continuous"
family = "gamma"
unit_label = "days"
casemix = "C(age_band) + emergency"

[[measures]]
key = "pressure"
name = "Pressure injury"
definition = "New pressure injury during the stay (invented unit totals)."
outcome = "pressure_injury"
summary = "pressure_by_unit.csv"
"""


@pytest.fixture(scope="module")
def quick_cycles(tmp_path_factory):
    """Two cycles of the same invented network (periods 1 and 2): (folder, first, second)."""
    folder = tmp_path_factory.mktemp("quick")
    units, cohort, _, summary = invent_network(seed=5, n_units=14, smallest=8, largest=600)
    units.to_csv(folder / "units.csv", index=False)
    cohort.to_csv(folder / "cohort.csv", index=False)
    summary.to_csv(folder / "pressure_by_unit.csv", index=False)
    out = []
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr("pipeline.shrinkage.sampling.Sampler.run", fake_run)
        for period in ("Invented year 1", "Invented year 2"):
            text = textwrap.dedent(CONFIG.format(period=period))
            (folder / "cycle.toml").write_text(text, encoding="utf-8")
            out.append(run_cycle(load_config(folder / "cycle.toml")))
    return folder, out[0], out[1]


def test_results_table_agrees_with_its_downloads(quick_cycles):
    folder, _, summary = quick_cycles
    site = folder / "site"
    table = public_table(summary.results)
    csv = pd.read_csv(site / "downloads" / "results.csv", dtype={"unit_id": str})
    assert list(csv.columns) == list(table.columns) and len(csv) == len(table)
    for column in NUMERIC_PUBLIC:  # written with 6 significant digits
        assert np.allclose(csv[column], table[column], rtol=1e-5, equal_nan=True), column
    rows = json.loads((site / "downloads" / "results.json").read_text())["results"]
    assert [r["unit_id"] for r in rows] == list(table["unit_id"])
    for r, (_, t) in zip(rows, table.iterrows(), strict=True):
        for column in ("rsr_median", "observed", "cases"):
            assert (r[column] is None) == pd.isna(t[column]), column


def test_every_reported_number_is_consistent_with_its_interval_and_the_benchmark(quick_cycles):
    _, _, summary = quick_cycles
    for r in summary.results:
        t = r.table[r.table["status"] == "reported"]
        assert len(t) > 0, r.measure.key
        assert (t["rsr_lower"] <= t["rsr_median"]).all() and (
            t["rsr_median"] <= t["rsr_upper"]
        ).all()
        above, below = t["rsr_lower"] > r.benchmark, t["rsr_upper"] < r.benchmark
        expected = np.where(above, "above", np.where(below, "below", "spans"))
        assert list(t["position"]) == list(expected), r.measure.key
        assert np.allclose(t["rsr_median"], t["ratio_median"] * r.benchmark, rtol=1e-9)
        weight = t["own_weight"].dropna()
        assert ((weight >= 0) & (weight <= 1)).all()
        hidden = r.table[r.table["status"] != "reported"]
        assert hidden["position"].eq("").all()


def test_small_counts_are_ranges_and_their_giveaways_are_blank(quick_cycles):
    _, _, summary = quick_cycles
    table = public_table(summary.results)
    small = table[table["count_status"] == "small"]
    assert len(small), "the invented network should have small counts to hide"
    assert small[["observed", "raw_rate", "oe_ratio", "own_weight"]].isna().all().all()
    assert (small["observed_low"] >= 1).all() and (
        small["observed_low"] <= small["observed_high"]
    ).all()
    assert (small["observed_high"] <= small["cases"] - 1).all()


class _Links(HTMLParser):
    def __init__(self):
        super().__init__()
        self.links: list[str] = []
        self.images: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "a" and a.get("href"):
            self.links.append(a["href"])
        if tag == "img" and a.get("src"):
            self.images.append(a["src"])


def _local(base: Path, ref: str) -> Path | None:
    if re.match(r"^[a-z]+:", ref) or ref.startswith("#"):
        return None
    return (base.parent / ref.split("#")[0]).resolve()


def test_every_page_link_and_figure_of_the_rendered_site_exists(quick_cycles):
    folder, _, summary = quick_cycles
    site = folder / "site"
    pages = sorted(site.rglob("*.html"))
    units = len(summary.results[0].table)
    assert len(pages) >= units + 3 * 2 + 5  # unit pages, measure and model pages, the rest
    missing = []
    for page in pages:
        parser = _Links()
        parser.feed(page.read_text(encoding="utf-8"))
        assert parser.links, page.name
        for ref in parser.links + parser.images:
            target = _local(page, ref)
            if target is not None and ref.split("#")[0] and not target.exists():
                missing.append(f"{page.relative_to(site)} -> {ref}")
    assert not missing, missing[:10]
    drawn = sorted((site / "figures").glob("*.svg"))
    assert len(drawn) >= units  # a position strip per unit with results, and the measure charts


def test_the_second_cycle_compares_with_the_first_and_keeps_every_address(quick_cycles):
    folder, first, second = quick_cycles
    changes = (folder / "site" / "changes.html").read_text(encoding="utf-8")
    assert "Invented year 1" in changes
    history = json.loads((folder / "history" / "cycles.json").read_text())
    assert len(history) == 2
    first_units = sorted(p.name for p in (folder / "site" / "units").glob("*.html"))
    assert len(first_units) == len(first.results[0].table) == len(second.results[0].table)
