"""Nothing leaked, nothing lost, everything traceable: privacy, safe pages, provenance,
atomic publishing under faults, determinism."""

from __future__ import annotations

import dataclasses
import errno
import hashlib
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import time
from html.parser import HTMLParser
from pathlib import Path

import pandas as pd
import pytest

from pipeline.config import load_config
from pipeline.cycle import MARKER, remove_stale_builds, run_cycle
from pipeline.disclosure import protect_units
from pipeline.errors import RenderError
from pipeline.website import readability


def _files(site: Path) -> list[Path]:
    return sorted(p for p in site.rglob("*") if p.is_file())


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in _files(folder)}


def test_complementary_suppression_hides_enough_to_protect_a_lone_small_unit():
    table = pd.DataFrame(
        {
            "unit_id": list("abcde"),
            "status": ["reported", "too_few", "reported", "reported", "no_cases"],
            "cases": [300, 4, 25, 40, 0],
        }
    )
    protect_units(table, 11)
    assert table["status"].tolist() == ["reported", "too_few", "withheld", "reported", "no_cases"]
    two_small = pd.DataFrame(
        {"unit_id": list("abc"), "status": ["too_few", "too_few", "reported"], "cases": [6, 7, 90]}
    )
    protect_units(two_small, 11)  # 6 + 7 >= 11 and two units: nothing more to hide
    assert two_small["status"].tolist() == ["too_few", "too_few", "reported"]
    tiny = pd.DataFrame(
        {
            "unit_id": list("abcd"),
            "status": ["too_few", "too_few", "reported", "reported"],
            "cases": [2, 3, 50, 20],
        }
    )
    protect_units(tiny, 11)  # 2 + 3 < 11: the smallest reported unit joins them
    assert tiny["status"].tolist() == ["too_few", "too_few", "reported", "withheld"]
    # A unit of 1 case and a withheld unit of 11: a reader knows the withheld unit has at least 11
    # cases and at most as many as the smallest unit shown, so 12 hidden cases would give 1 and 11
    # back. A second unit is withheld.
    pinned_pair = pd.DataFrame(
        {
            "unit_id": list("abcd"),
            "status": ["too_few", "reported", "reported", "reported"],
            "cases": [1, 11, 30, 200],
        }
    )
    protect_units(pinned_pair, 11)
    assert pinned_pair["status"].tolist() == ["too_few", "withheld", "withheld", "reported"]


@pytest.mark.slow
def test_no_patient_level_value_reaches_any_output_file(hostile_cycle):
    folder, markers, summary, site = hostile_cycle
    blobs = {p: p.read_bytes() for p in _files(site)}
    assert len(blobs) > 20
    for column, values in markers.items():
        for value in values:
            token = value.encode()
            leaked = [p for p, blob in blobs.items() if token in blob]
            assert leaked == [], f"{column} value {value} found in {leaked}"
    warning = next(w for w in summary.warnings if "look like direct identifiers" in w)
    assert "patient_name, date_of_birth, phone" in warning


@pytest.mark.slow
def test_small_units_and_their_complement_are_suppressed_in_the_downloads(hostile_cycle):
    _, _, summary, site = hostile_cycle
    table = pd.read_csv(site / "downloads" / "results.csv")
    hidden = table[table["status"].isin(["too_few", "withheld"])]
    internal = summary.results[0].table.set_index("unit_id")
    assert len(hidden) >= 2 and internal.loc[hidden["unit_id"], "cases"].sum() >= 11
    assert hidden[["cases", "observed", "expected", "rsr_median"]].isna().all().all()


class _Refs(HTMLParser):
    def __init__(self):
        super().__init__()
        self.refs, self.scripts, self.inline_scripts = [], [], 0
        self.in_script = False

    def handle_starttag(self, tag, attrs):
        if tag == "script":
            self.scripts.append(dict(attrs).get("src", ""))
            self.in_script = True
        self.refs += [v for k, v in attrs if k in ("href", "src") and v]

    def handle_endtag(self, tag):
        self.in_script = self.in_script and tag != "script"

    def handle_data(self, data):
        self.inline_scripts += self.in_script and bool(data.strip())


@pytest.mark.slow
def test_pages_show_hostile_names_literally_load_nothing_from_elsewhere_and_carry_a_csp(
    hostile_cycle,
):
    _, _, _, site = hostile_cycle
    pages = [p for p in _files(site) if p.suffix == ".html" and "_source" not in p.parts]
    for page in pages:
        text = page.read_text()
        parser = _Refs()
        parser.feed(text)
        # Only the site's own script files; no inline code (the CSP would refuse it anyway).
        assert all(
            re.fullmatch(r"(\.\./)*assets/(fairgauge|search-index)\.js", src)
            for src in parser.scripts
        ), (page, parser.scripts)
        assert parser.inline_scripts == 0, page
        assert not [
            r for r in parser.refs if "//" in r or r.startswith(("http", "data:", "javascript:"))
        ], page
        assert (
            '<meta http-equiv="Content-Security-Policy" content="default-src \'none\';' in text
            and "script-src 'self';" in text
        )
    home = (site / "index.html").read_text()
    assert (
        "&lt;script&gt;alert('x')&lt;/script&gt; *Bold* [link](http://evil.example) | pipe" in home
    )
    assert "St. Mary's # 1 &amp; &lt;b&gt;Co&lt;/b&gt;" in home
    # title and heading
    assert (site / "units" / "mv01.html").read_text().count("&lt;script&gt;") >= 2


@pytest.mark.slow
def test_manifest_records_inputs_settings_and_diagnostics(hostile_cycle):
    folder, _, summary, site = hostile_cycle
    manifest = json.loads((site / MARKER).read_text())
    for name in ("cohort.csv", "units.csv"):
        assert (
            manifest["input_sha256"][name]
            == hashlib.sha256((folder / name).read_bytes()).hexdigest()
        )
    assert (
        manifest["config_sha256"]
        == hashlib.sha256((folder / "cycle.toml").read_bytes()).hexdigest()
    )
    assert manifest["seed"] == 99 and manifest["renderer"].startswith("builtin")
    assert (
        manifest["diagnostics"]["readmit30"]["divergences"]
        == summary.results[0].diagnostics.divergences
    )
    assert {"pymc", "nutpie", "statsmodels"} <= set(manifest["versions"])
    methods = (site / "methods.html").read_text()
    assert (
        'href="fairgauge-manifest.json"' in methods
        and manifest["input_sha256"]["cohort.csv"] in methods
    )


def _cycle_copy(folder: Path, target: Path) -> Path:
    """The same config and inputs, byte for byte, in ``target`` (whose site goes to target/site)."""
    target.mkdir(exist_ok=True)
    for name in ("cycle.toml", "cohort.csv", "units.csv"):
        shutil.copy2(folder / name, target / name)
    return target / "cycle.toml"


@pytest.mark.slow
def test_same_inputs_give_identical_files_in_a_fresh_process(hostile_cycle, tmp_path):
    folder, _, _, site = hostile_cycle
    again = _cycle_copy(folder, tmp_path).parent / "site"
    done = subprocess.run(
        [sys.executable, "-m", "pipeline.cli", "build", str(tmp_path / "cycle.toml")],
        capture_output=True,
        text=True,
    )
    assert done.returncode == 0, done.stderr
    built = {json.loads((d / MARKER).read_text())["built"] for d in (site, again)}
    first, second = _snapshot(site), _snapshot(again)
    assert first.keys() == second.keys()
    differing = [name for name in first if first[name] != second[name]]
    for name in differing:  # only the build-time field may differ
        assert _without(first[name], built) == _without(second[name], built), name
    assert set(differing) <= {
        MARKER,
        "methods.html",
        "_source/methods.qmd",
        "_source/fairgauge-manifest.json",
        "downloads/results.json",
        "_source/downloads/results.json",
    }
    assert first["downloads/results.csv"] == second["downloads/results.csv"]


@pytest.mark.slow
def test_a_killed_cycle_leaves_the_last_good_site_byte_for_byte(hostile_cycle, tmp_path):
    folder, _, _, site = hostile_cycle
    config = _cycle_copy(folder, tmp_path)
    published = tmp_path / "site"
    shutil.copytree(site, published)
    before = _snapshot(published)
    process = subprocess.Popen(
        [sys.executable, "-m", "pipeline.cli", "build", str(config)],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    deadline = time.monotonic() + 240
    while (
        not list(tmp_path.glob(".site.tmp-*"))
        and process.poll() is None
        and time.monotonic() < deadline
    ):
        time.sleep(0.05)  # wait until the new site is being written
    assert process.poll() is None, "the cycle finished before it could be killed"
    os.kill(process.pid, signal.SIGKILL)
    process.wait()
    assert _snapshot(published) == before
    assert list(tmp_path.glob(".site.tmp-*"))  # the killed build's folder is left behind ...
    remove_stale_builds(published)
    # ... until the next cycle
    assert not list(tmp_path.glob(".site.*")) and (tmp_path / "site").is_dir()


@pytest.mark.slow
@pytest.mark.parametrize(
    "target, error, message",
    [
        (
            "pipeline.cycle.tempfile.mkdtemp",
            errno.EROFS,
            "cannot write beside the output folder {out} (Read-only file system); the previous "
            "site was left as it was.",
        ),
        (
            "pipeline.cycle.results_json",
            errno.ENOSPC,
            "writing the new site failed (No space left on device",
        ),
    ],
)
def test_an_unwritable_or_full_disk_ends_in_a_clear_message_and_keeps_the_site(
    hostile_cycle, tmp_path, monkeypatch, target, error, message
):
    folder, _, summary, site = hostile_cycle
    published = tmp_path / "published"
    shutil.copytree(site, published)
    before = _snapshot(published)
    config = load_config(folder / "cycle.toml")
    config = dataclasses.replace(config, cycle=dataclasses.replace(config.cycle, output=published))
    monkeypatch.setattr("pipeline.cycle.fit_measures", lambda *a: summary.results)

    def fail(*args, **kwargs):
        raise OSError(error, os.strerror(error))

    monkeypatch.setattr(target, fail)
    with pytest.raises(RenderError) as caught:
        run_cycle(config)
    assert str(caught.value).startswith(message.format(out=published))
    assert _snapshot(published) == before
    assert [p.name for p in tmp_path.iterdir()] == ["published"]


class _SamplerCalled(Exception):
    pass


def _with_measure(config, **changes):
    measure = dataclasses.replace(config.measures[0], **changes)
    return dataclasses.replace(config, measures=(measure,))


@pytest.mark.slow
def test_wording_changes_reuse_cached_fits_but_model_changes_refit(hostile_cycle, monkeypatch):
    folder, _, _, site = hostile_cycle

    def sampler_called(self, cells, seed):
        raise _SamplerCalled

    monkeypatch.setattr("pipeline.shrinkage.sampling.Sampler.run", sampler_called)
    config = load_config(folder / "cycle.toml")
    reworded = _with_measure(config, definition="Patients readmitted, reworded for this test.")
    start = time.perf_counter()
    run_cycle(reworded)  # would raise if it tried to sample
    assert time.perf_counter() - start < 30
    assert (
        "Patients readmitted, reworded for this test."
        in (site / "measures" / "readmit30.html").read_text()
    )
    with pytest.raises(_SamplerCalled):
        run_cycle(_with_measure(config, casemix="C(age_band) + frailty"))
    with pytest.raises(_SamplerCalled):
        run_cycle(
            dataclasses.replace(config, sampler=dataclasses.replace(config.sampler, seed=100))
        )
    run_cycle(config)  # back to the fixture's own site for the tests that follow


@pytest.mark.slow
def test_history_gives_trends_and_changes_and_an_old_cycle_rebuilds_to_its_published_numbers(
    hostile_cycle, tmp_path, monkeypatch
):
    folder, _, summary, _ = hostile_cycle
    config_path = _cycle_copy(folder, tmp_path)
    shutil.copytree(folder / ".fairgauge-cache", tmp_path / ".fairgauge-cache")
    first = load_config(config_path)
    run_cycle(first)  # cycle 1 from the cache: "Test period"
    first_changes = (tmp_path / "site" / "changes.html").read_text()
    assert "This is the first cycle on this site" in first_changes

    # Cycle 2: the same fits, except that the largest unit's rate is 1.5 times as high.
    result = summary.results[0]
    big = result.table.loc[result.table["cases"].idxmax(), "unit_id"]
    moved = dataclasses.replace(
        result, rsr_draws=result.rsr_draws.assign(**{big: result.rsr_draws[big] * 1.5})
    )
    monkeypatch.setattr("pipeline.cycle.fit_measures", lambda *a: [moved])
    second = dataclasses.replace(
        first, cycle=dataclasses.replace(first.cycle, period="Next test period")
    )
    run_cycle(second)
    index = json.loads((tmp_path / "history" / "cycles.json").read_text())
    assert [e["period"] for e in index] == ["Test period", "Next test period"]
    changes = (tmp_path / "site" / "changes.html").read_text()
    assert "compares Next test period with the last cycle, Test period" in changes
    # Both kinds of changes page read at the site's level (Kincaid et al. 1975 grade; limit 8 as in
    # test_site).
    assert readability.page_level(changes).grade <= readability.GRADE_LIMIT
    assert readability.page_level(first_changes).grade <= readability.GRADE_LIMIT
    row = next(tr for tr in re.findall(r"<tr>.*?</tr>", changes, re.S) if f"units/{big}.html" in tr)
    assert "more than 99%" in row and "Probably higher than last cycle" in row
    assert changes.count("No clear change") >= 3  # unchanged draws: a tie, one half either way
    profile = (tmp_path / "site" / "units" / f"{big}.html").read_text()
    assert (
        "Earlier cycles" in profile and "Test period" in profile and "Next test period" in profile
    )
    trend = re.search(rf'<img src="\.\./figures/trend-{big}\.svg" alt="([^"]+)"', profile)
    # the trend chart, described from its data
    assert trend and "Test period" in trend.group(1) and "Next test period" in trend.group(1)
    assert (tmp_path / "site" / "figures" / f"trend-{big}.svg").stat().st_size > 5000

    # Rebuilding the first cycle from scratch reproduces what was published for it.
    monkeypatch.undo()
    run_cycle(first, no_cache=True)
    assert (tmp_path / "site" / "downloads" / "results.csv").read_bytes() == (
        tmp_path / "history" / "test-period" / "results.csv"
    ).read_bytes()
    assert (
        "This is the first cycle on this site" in (tmp_path / "site" / "changes.html").read_text()
    )
    assert [
        e["period"] for e in json.loads((tmp_path / "history" / "cycles.json").read_text())
    ] == ["Test period", "Next test period"]


@pytest.mark.slow
def test_ten_thousand_units_are_checked_fitted_and_published(tmp_path, capsys):
    """A very large network: exact case-mix solver for many units, tables instead of figures."""
    import numpy as np

    from pipeline.cli import main

    rng = np.random.default_rng(1)
    n_units = 10_000
    sizes = rng.integers(3, 13, n_units)
    unit = np.repeat(np.arange(n_units), sizes)
    male = rng.random(len(unit)) < 0.5
    y = (
        rng.random(len(unit))
        < 1 / (1 + np.exp(-(-1.7 + 0.3 * male + rng.normal(0, 0.3, n_units)[unit])))
    ).astype(int)
    ids = np.array([f"u{i:05d}" for i in range(n_units)])
    pd.DataFrame(
        {"id": ids, "name": [f"Unit {i}" for i in range(n_units)], "kind": "clinic"}
    ).to_csv(tmp_path / "units.csv", index=False)
    pd.DataFrame(
        {
            "stay_id": np.arange(len(unit)),
            "unit_id": ids[unit],
            "sex": np.where(male, "M", "F"),
            "readmit": y,
        }
    ).to_csv(tmp_path / "cohort.csv", index=False)
    from .conftest import BASE_CONFIG

    # tau mixes slowly with 10,000 units of 3-12 patients: 1,000 kept draws gave a bulk ESS of 356
    # (below the 400 limit, a clear FitError); 1,500 pass. Automatic retries are issue 4's work.
    text = BASE_CONFIG.replace('casemix = "age + C(sex)"', 'casemix = "C(sex)"').replace(
        "chains = 2\ndraws = 300\ntune = 300\ncores = 1", "draws = 1500\nseed = 1"
    )
    (tmp_path / "cycle.toml").write_text(text)
    assert main(["check", str(tmp_path / "cycle.toml")]) == 0
    assert "75,093 patient rows, 10000 units with cases" in capsys.readouterr().out
    summary = run_cycle(load_config(tmp_path / "cycle.toml"))
    assert summary.results[0].casemix.solver == "block-newton"
    assert any("figures are drawn for networks of up to 300 units" in w for w in summary.warnings)
    site = tmp_path / "site"
    assert len(list((site / "units").glob("*.html"))) == n_units
    table = pd.read_csv(site / "downloads" / "results.csv")
    assert len(table) == n_units and (table["status"] == "reported").sum() > 1000
    assert (
        not (site / "figures").exists()
        and "<img" not in (site / "measures" / "readmit.html").read_text()
    )


def _without(page: bytes, built: set[str]) -> str:
    """A page's text without the lines that carry the build time."""
    return "\n".join(
        line for line in page.decode().splitlines() if not any(t in line for t in built)
    )
