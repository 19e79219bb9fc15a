"""End to end: the demo cycle builds a complete site; its known true effects are recovered;
a failed cycle leaves the last good site untouched."""

from __future__ import annotations

import dataclasses
import re
import shutil
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from pipeline.config import load_config
from pipeline.cycle import MARKER, run_cycle
from pipeline.errors import FitError, RenderError
from pipeline.shrinkage.sampling import Diagnostics, Sampler
from pipeline.website.addresses import unit_addresses

from .conftest import demo_counts

pytestmark = pytest.mark.slow


class _Links(HTMLParser):
    def __init__(self):
        super().__init__()
        self.targets: list[str] = []

    def handle_starttag(self, tag, attrs):
        for name, value in attrs:
            if (tag, name) in {("a", "href"), ("img", "src"), ("link", "href")} and value:
                self.targets.append(value)


def _html_pages(site: Path) -> list[Path]:
    return sorted(p for p in site.rglob("*.html") if "_source" not in p.parts)


def test_quarto_project_is_complete_and_has_no_code_cells(demo_cycle):
    _, summary, site = demo_cycle
    project = site / "_source"
    config = yaml.safe_load((project / "_quarto.yml").read_text())
    assert config["project"]["type"] == "website"
    listed = config["project"]["render"]
    on_disk = sorted(p.relative_to(project).as_posix() for p in project.rglob("*.qmd"))
    assert sorted(listed) == on_disk
    # home, units, guide, measures, model reports, profiles, changes, methods, cautions, downloads
    assert len(listed) == 1 + 1 + 1 + 2 * len(summary.measures) + summary.units + 4
    for item in config["website"]["navbar"]["left"]:
        for link in item.get("menu", [item]):
            assert (project / link["href"]).is_file()
    for qmd in listed:
        text = (project / qmd).read_text()
        assert text.startswith("---\n")
        assert not re.search(r"^```+\s*\{", text, re.M), f"{qmd} has an executable code cell"


def test_every_page_is_rendered_and_every_link_and_image_resolves(demo_cycle):
    _, summary, site = demo_cycle
    pages = _html_pages(site)
    # ... and the built-in renderer's search page
    assert len(pages) == 1 + 1 + 1 + 2 * len(summary.measures) + summary.units + 4 + 1
    broken = []
    for page in pages:
        parser = _Links()
        parser.feed(page.read_text())
        assert parser.targets, page
        for target in parser.targets:
            if target.startswith(("#", "http:", "https:", "mailto:")):
                continue
            path = (page.parent / target.split("#")[0]).resolve()
            if not path.is_file():
                broken.append(f"{page.relative_to(site)} -> {target}")
    assert broken == []
    assert (site / "figures" / "intervals-readmit30.svg").stat().st_size > 10_000
    assert (site / "figures" / "intervals-readmit30.png").stat().st_size > 10_000
    assert (site / MARKER).is_file()


def test_every_page_says_the_data_are_invented_and_carries_the_caution(demo_cycle):
    _, _, site = demo_cycle
    for page in _html_pages(site):
        text = page.read_text()
        if page.name != "search.html":  # the renderer's search page has the footer's words only
            assert "Everything on this site is invented, to show how the site works" in text, page
        assert "invented demonstration data" in text, page  # footer
    for page in ["index.html", "cautions.html", "measures/death30.html", "units/mv01.html"]:
        assert "Do not choose or avoid care on these numbers alone" in (site / page).read_text()


def test_downloads_hold_one_row_per_unit_and_measure_and_suppress_small_units(demo_cycle):
    _, summary, site = demo_cycle
    table = pd.read_csv(site / "downloads" / "results.csv")
    assert len(table) == summary.units * len(summary.measures)
    small = table[table["status"] == "too_few"]
    assert len(small) > 0  # the demo always has a 10-patient unit
    assert (
        small[["cases", "observed", "expected", "raw_rate", "rsr_median", "prob_above_benchmark"]]
        .isna()
        .all()
        .all()
    )
    reported = table[table["status"] == "reported"]
    # rates; stay is in days
    assert reported.loc[reported["measure"] != "stay", "rsr_median"].between(0, 1).all()
    assert (reported["rsr_lower"] <= reported["rsr_median"]).all() and (
        reported["rsr_median"] <= reported["rsr_upper"]
    ).all()
    unit = small.iloc[0]
    assert (
        "too few for a fair estimate"
        in (
            site / "units" / f"{unit_addresses(table['unit_id'].unique())[unit['unit_id']]}.html"
        ).read_text()
    )


def test_no_patient_rows_reach_the_site(demo_cycle):
    files, _, site = demo_cycle
    stay_ids = set(
        pd.read_csv(files.cohort, usecols=["stay_id"])["stay_id"].sample(200, random_state=1)
    )
    for path in site.rglob("*"):
        if path.is_file() and path.suffix in {".html", ".qmd", ".csv", ".json", ".yml"}:
            text = path.read_text()
            assert not any(s in text for s in stay_ids), path


def test_methods_page_shows_this_cycles_numbers(demo_cycle):
    _, summary, site = demo_cycle
    methods = (site / "methods.html").read_text()
    for r in summary.results:
        if r.measure.type == "binary" and not r.measure.summary:
            assert f"{r.casemix.c_statistic:.3f}" in methods
        assert f"{r.diagnostics.rhat_max:.3f}" in methods
        assert f'href="models/{r.measure.key}.html"' in methods
    assert "tau ~ HalfNormal(sigma=1)" in methods
    assert "shape ~ HalfNormal(sigma=5)" in methods


def test_model_reports_show_validation_exclusions_and_social_risk(demo_cycle):
    _, summary, site = demo_cycle
    by_key = {r.measure.key: r for r in summary.results}
    readmit = (site / "models" / "readmit30.html").read_text()
    v = by_key["readmit30"].validation
    assert v.folds == 5 and v.cross_validated is not None
    assert (
        f"{v.in_sample.values['c_statistic']:.3f} ({v.in_sample.values['c_lower']:.3f} to "
        f"{v.in_sample.values['c_upper']:.3f})" in readmit
    )
    assert (
        "Hosmer-Lemeshow statistic" in readmit
        and "Calibration slope" in readmit
        and "Brier score" in readmit
    )
    for kind in ("roc", "calibration"):
        assert (
            f'src="../figures/model-readmit30-{kind}.svg"' in readmit
            and (site / "figures" / f"model-readmit30-{kind}.svg").stat().st_size > 5000
        )
    dropped = by_key["readmit30"].casemix.exclusions["dropped_rows"]
    assert dropped > 0 and f"{dropped:,} patients were left out of this measure" in readmit
    assert by_key["readmit30"].equity is not None and "Social risk: with and without" in readmit
    assert (
        f"{int(by_key['readmit30'].equity['changed'].sum())} of "
        f"{len(by_key['readmit30'].equity)} reported units" in readmit
    )
    stay = (site / "models" / "stay.html").read_text()
    assert "Gamma GLM with log link" in stay and "R-squared" in stay and "Ratio of means" in stay
    assert "had a missing risk factor filled in" in stay
    assert "days" in (site / "measures" / "stay.html").read_text()
    assert "fitted no case-mix model" in (site / "models" / "pressure.html").read_text()
    assert (
        by_key["pressure"].validation is None
        and by_key["pressure"].casemix.family == "unit summary"
    )


def test_demo_true_effects_are_recovered_at_about_the_nominal_rate(demo_cycle):
    files, summary, _ = demo_cycle
    truth = pd.read_csv(files.truth, dtype={"unit_id": str})
    fitted = pd.concat([r.table for r in summary.results]).merge(truth, on=["measure", "unit_id"])
    # The true ratio to the benchmark: the unit's expected total at its true quality over its
    # published E.
    fitted["true_ratio"] = fitted["true_predicted"] / fitted["expected"]
    inside = (fitted["ratio_lower"] <= fitted["true_ratio"]) & (
        fitted["true_ratio"] <= fitted["ratio_upper"]
    )
    coverage = inside.mean()
    # 95% intervals over 5 measures x 44 units = 220 intervals: the binomial SD of coverage is
    # about 1.5 points, so 89% is 4 SD below nominal.
    assert len(fitted) == 220
    assert 0.89 <= coverage <= 1.0, f"coverage {coverage:.3f}"
    # Shrinkage must pay off: adjusted ratios closer to the truth than raw O/E ratios. The raw
    # ratios come
    # from the true counts (conftest.demo_counts), since small counts and their O/E are not
    # published.
    true = demo_counts(files.config.parent).rename(columns={"observed": "true_observed"})
    fitted = fitted.merge(true[["measure", "unit_id", "true_observed"]], on=["measure", "unit_id"])
    assert (
        np.isclose(fitted["observed"], fitted["true_observed"], rtol=1e-9)
        | fitted["observed"].isna()
    ).all()
    fitted["oe_ratio"] = fitted["true_observed"] / fitted["expected"]
    error_shrunk = np.sqrt(np.mean(np.log(fitted["ratio_median"] / fitted["true_ratio"]) ** 2))
    with_events = fitted[fitted["true_observed"] > 0]
    error_raw = np.sqrt(np.mean(np.log(with_events["oe_ratio"] / with_events["true_ratio"]) ** 2))
    assert error_shrunk < 0.8 * error_raw, (error_shrunk, error_raw)


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {
        p.relative_to(folder).as_posix(): p.read_bytes()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def test_a_failed_cycle_leaves_the_last_good_site_byte_for_byte(demo_cycle, tmp_path, monkeypatch):
    files, _, site = demo_cycle
    last_good = tmp_path / "published"
    shutil.copytree(site, last_good)
    before = _snapshot(last_good)
    config = load_config(files.config)
    config = dataclasses.replace(config, cycle=dataclasses.replace(config.cycle, output=last_good))

    calls = []

    # a sampler whose chains disagree, also on the retry
    def failing_run(self, cells, seed, settings=None):
        calls.append(settings)
        return {}, Diagnostics(
            rhat_max=1.2,
            ess_bulk_min=50,
            divergences=0,
            chains=4,
            draws=1000,
            seconds=0.1,
            retried=settings is not None,
        )

    monkeypatch.setattr(Sampler, "run", failing_run)
    with pytest.raises(
        FitError, match="largest R-hat 1.200 is above 1.01.*also on the retry with safer settings"
    ):
        # the cache would reuse the session's good fits
        run_cycle(config, renderer="builtin", no_cache=True)
    assert calls[0] is None and (calls[1].tune, calls[1].target_accept) == (
        2 * config.sampler.tune,
        0.99,
    )
    assert _snapshot(last_good) == before
    # no half-built folders left behind
    assert [p.name for p in tmp_path.iterdir()] == ["published"]


def test_a_folder_fairgauge_did_not_make_is_never_replaced(demo_cycle, tmp_path, monkeypatch):
    files, summary, _ = demo_cycle
    precious = tmp_path / "precious"
    precious.mkdir()
    (precious / "notes.txt").write_text("keep me")
    config = load_config(files.config)
    config = dataclasses.replace(config, cycle=dataclasses.replace(config.cycle, output=precious))
    # reuse the session's fits
    monkeypatch.setattr("pipeline.cycle.fit_measures", lambda *a: summary.results)
    with pytest.raises(RenderError, match="was not made by fairgauge, so it was left alone"):
        run_cycle(config, renderer="builtin")
    assert [p.name for p in tmp_path.iterdir()] == ["precious"] and (
        precious / "notes.txt"
    ).read_text() == "keep me"


def _fake_quarto(folder: Path, body: str) -> None:
    """A stand-in `quarto` on PATH (Quarto itself cannot be installed on these machines)."""
    folder.mkdir()
    script = folder / "quarto"
    script.write_text(
        f'#!/bin/sh\nif [ "$1" = "--version" ]; then echo 9.9.9; exit 0; fi\n{body}\n'
    )
    script.chmod(0o755)


def _config_with_output(files, output: Path):
    config = load_config(files.config)
    return dataclasses.replace(
        config, cycle=dataclasses.replace(config.cycle, output=output, renderer="auto")
    )


def test_quarto_is_used_when_found_and_its_site_is_published(demo_cycle, tmp_path, monkeypatch):
    files, summary, _ = demo_cycle
    _fake_quarto(
        tmp_path / "bin",
        # like Quarto, it leaves its working files in the project
        'cd "$2" && mkdir -p _site .quarto/idx && echo /.quarto/ > .gitignore && '
        "grep -c qmd _quarto.yml > _site/index.html",
    )
    monkeypatch.setenv("PATH", f"{tmp_path / 'bin'}:{__import__('os').environ['PATH']}")
    monkeypatch.setattr("pipeline.cycle.fit_measures", lambda *a: summary.results)
    result = run_cycle(_config_with_output(files, tmp_path / "out"))
    assert result.renderer.name == "quarto" and result.renderer.version == "9.9.9"
    # Quarto's output, moved into place
    assert int((tmp_path / "out" / "index.html").read_text()) > summary.units
    assert (tmp_path / "out" / "_source" / "_quarto.yml").is_file()
    # ... and its working files are not published as sources
    assert not (tmp_path / "out" / "_source" / ".quarto").exists()
    assert not (tmp_path / "out" / "_source" / ".gitignore").exists()


def test_a_quarto_failure_shows_its_output_and_keeps_the_last_site(
    demo_cycle, tmp_path, monkeypatch
):
    files, summary, site = demo_cycle
    last_good = tmp_path / "published"
    shutil.copytree(site, last_good)
    before = _snapshot(last_good)
    _fake_quarto(tmp_path / "bin", 'echo "ERROR: could not find the theme"; exit 1')
    monkeypatch.setenv("PATH", f"{tmp_path / 'bin'}:{__import__('os').environ['PATH']}")
    monkeypatch.setattr("pipeline.cycle.fit_measures", lambda *a: summary.results)
    with pytest.raises(
        RenderError, match="exited with code 1. Its output:\nERROR: could not find the theme"
    ):
        run_cycle(_config_with_output(files, last_good))
    assert _snapshot(last_good) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bin", "published"]


def test_expected_values_supplied_per_patient_flow_through_and_are_validated(hostile_cycle):
    _, _, summary, site = hostile_cycle
    death = next(r for r in summary.results if r.measure.key == "death30")
    assert death.casemix.family == "supplied" and death.casemix.coefficients.empty
    assert death.validation.folds == 0 and death.validation.cross_validated is None
    assert death.validation.in_sample.values["c_statistic"] > 0.5
    page = (site / "models" / "death30.html").read_text()
    assert "Expected values were supplied for each patient" in page and "vendor\\_risk" not in page
    assert death.table.loc[death.table["status"] == "reported", "expected"].gt(0).all()


def test_groups_ranks_and_weights_follow_their_rules(demo_cycle):
    _, summary, site = demo_cycle
    table = pd.read_csv(site / "downloads" / "results.csv")
    for r in summary.results:
        t = r.table[r.table["status"] == "reported"]
        lower_better = r.measure.better == "lower"
        better = t["rsr_upper"] < r.benchmark if lower_better else t["rsr_lower"] > r.benchmark
        worse = t["rsr_lower"] > r.benchmark if lower_better else t["rsr_upper"] < r.benchmark
        # the interval rule
        assert (t["group"] == np.where(better, "better", np.where(worse, "worse", "typical"))).all()
        # outside a 95% interval
        assert t.loc[t["group"] != "typical", "prob_other_side"].lt(0.025 + 0.01).all()
        assert (
            t["rank_lower"].le(t["rank_median"]).all()
            and t["rank_median"].le(t["rank_upper"]).all()
        )
        assert t["rank_upper"].max() <= len(t) and t["rank_lower"].min() >= 1
        # the small-count rule hides the weight with the count (disclosure.py)
        shown = t["count_status"] == "shown"
        assert (
            t.loc[shown, "own_weight"].between(0, 1).all()
            and t.loc[~shown, "own_weight"].isna().all()
        )
        t = t[shown]
        big, small = t.loc[t["cases"].idxmax()], t.loc[t["cases"].idxmin()]
        assert big["own_weight"] > small["own_weight"]  # large units rest on their own data
        assert [alt["scale"] for alt in r.sensitivity] == [0.5, 2.0]
    hidden = table[table["status"] != "reported"]
    assert (
        hidden[["rank_median", "own_weight", "prob_other_side"]].isna().all().all()
        and hidden["group"].isna().all()
    )


TOTALS_CONFIG = """
[cycle]
title = "Unit totals only (invented)"
publisher = "Test publisher"
period = "Totals period"
output = "site"
renderer = "builtin"
invented_data = true

[inputs]
units = "units.csv"

[sampler]
chains = 2
draws = 500
tune = 500

[[measures]]
key = "falls"
name = "Falls in hospital"
definition = "Inpatients who fell during their stay (invented)."
outcome = "falls"
type = "binary"
better = "lower"
summary = "falls_by_unit.csv"
"""


@pytest.mark.slow
def test_a_cycle_of_unit_totals_alone_needs_no_patient_rows(tmp_path):
    # Many teams receive only observed and expected counts per unit from a risk tool run elsewhere.
    rng = np.random.default_rng(8)
    n = 15
    ids = [f"w{i:02d}" for i in range(n)]
    cases = rng.integers(40, 900, n)
    expected = np.round(cases * rng.uniform(0.02, 0.08, n), 2)
    observed = rng.poisson(expected)
    pd.DataFrame({"id": ids, "name": [f"Ward {i}" for i in range(n)], "kind": "ward"}).to_csv(
        tmp_path / "units.csv", index=False
    )
    pd.DataFrame({"unit_id": ids, "cases": cases, "falls": observed, "expected": expected}).to_csv(
        tmp_path / "falls_by_unit.csv", index=False
    )
    (tmp_path / "cycle.toml").write_text(TOTALS_CONFIG, encoding="utf-8")
    summary = run_cycle(load_config(tmp_path / "cycle.toml"))
    table = pd.read_csv(tmp_path / "site" / "downloads" / "results.csv")
    assert (
        summary.patients == 0 and len(table) == n and table["status"].eq("reported").sum() >= n - 1
    )
    reported = table[table["status"] == "reported"]
    true = pd.Series(observed, index=ids)[reported["unit_id"]].to_numpy()
    shown = (reported["count_status"] == "shown").to_numpy()
    assert (reported["observed"].to_numpy()[shown] == true[shown]).all()
    # the default small-count rule (11) applies
    small = (reported["count_status"] == "small").to_numpy()
    assert (
        small.any()
        and (
            (reported["observed_low"].to_numpy()[small] <= true[small])
            & (true[small] <= reported["observed_high"].to_numpy()[small])
        ).all()
    )
    # Supplied expected totals are scaled by one factor so the network expects what it observed
    # (benchmark.py).
    factor = observed.sum() / expected.sum()
    np.testing.assert_allclose(
        reported["expected"],
        expected[[ids.index(u) for u in reported["unit_id"]]] * factor,
        rtol=1e-5,
    )
    manifest = (tmp_path / "site" / "fairgauge-manifest.json").read_text()
    assert (
        "falls_by_unit.csv" in manifest
        and "cohort" not in manifest.split('"input_sha256"')[1].split("}")[0]
    )


def test_a_patient_measure_without_a_cohort_file_is_refused(tmp_path):
    from pipeline.errors import ConfigError

    text = TOTALS_CONFIG.replace('summary = "falls_by_unit.csv"\n', 'casemix = "1"\n')
    (tmp_path / "cycle.toml").write_text(text, encoding="utf-8")
    with pytest.raises(
        ConfigError, match=r"inputs.cohort: is required: measure\(s\) falls read patient rows"
    ):
        load_config(tmp_path / "cycle.toml")
