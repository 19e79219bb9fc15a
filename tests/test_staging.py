"""Preview before publishing: staging, confidential unit previews, corrections, sign-off and
promotion, on a small invented network with the fake sampler (tests/fake_sampler.py).

The properties proved: nothing of a preview reaches the public site or the history (planted
record ids and the preview mark are searched for byte by byte); each unit's counted records add
up to its published counts; an unsigned, altered or out-of-date build is refused and the public
site stays as it was; the history changes only on promotion; a published site's hash can be
checked with coreutils' ``sha256sum`` alone, following the recipe in its sign-off record.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from pipeline.cli import main
from pipeline.config import load_config
from pipeline.cycle import run_cycle
from pipeline.errors import ConfigError, ReviewError
from pipeline.invented import invent_network
from pipeline.staging.ledger import read_ledger
from pipeline.staging.previews import PREVIEW_MARK
from pipeline.staging.promote import content_hash, promote, sign_off
from pipeline.staging.stage import stage_cycle

from .fake_sampler import fake_run
from .test_quick_cycle import CONFIG

# record ids planted in the cohort: none may ever appear in the public site or the history
PLANT = "PLANTED-{:06d}-ID"
SIGNER = [("A. Reviewer (invented)", "Quality committee chair")]


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    """The invented network's input files, with planted record ids and a few missing risk
    factors (left out of readmission, imputed for length of stay)."""
    folder = tmp_path_factory.mktemp("inputs")
    units, cohort, _, summary = invent_network(seed=5, n_units=14, smallest=8, largest=600)
    cohort["stay_id"] = [PLANT.format(i) for i in range(len(cohort))]
    cohort.loc[[3, 40, 41, 900], "emergency"] = np.nan
    units.to_csv(folder / "units.csv", index=False)
    cohort.to_csv(folder / "cohort.csv", index=False)
    summary.to_csv(folder / "pressure_by_unit.csv", index=False)
    return folder


@pytest.fixture(autouse=True)
def quick(monkeypatch):
    monkeypatch.setattr("pipeline.shrinkage.sampling.Sampler.run", fake_run)


def _config(folder: Path, inputs: Path, period: str = "Invented year 1", review: str = "") -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    for f in inputs.iterdir():
        if not (folder / f.name).exists():
            shutil.copy(f, folder / f.name)
    text = textwrap.dedent(CONFIG.format(period=period))
    text = text.replace(
        'casemix = "C(age_band) + emergency"\npull_towards',
        'casemix = "C(age_band) + emergency"\nmissing = "drop"\npull_towards',
    ).replace(
        'unit_label = "days"\ncasemix = "C(age_band) + emergency"',
        'unit_label = "days"\ncasemix = "C(age_band) + emergency"\nmissing = "impute"',
    )
    text += f"\n[review]\nstaging = 'staged'\n{review}\n"
    (folder / "cycle.toml").write_text(text, encoding="utf-8")
    return folder / "cycle.toml"


def _bytes_of(folder: Path) -> dict[str, bytes]:
    return {
        p.relative_to(folder).as_posix(): p.read_bytes() for p in folder.rglob("*") if p.is_file()
    }


@pytest.fixture(scope="module")
def promoted(inputs, tmp_path_factory):
    """A published year 1 (built directly), then year 2 staged, signed off and promoted."""
    folder = tmp_path_factory.mktemp("promoted")
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr("pipeline.shrinkage.sampling.Sampler.run", fake_run)
        run_cycle(load_config(_config(folder, inputs)))
        config = load_config(_config(folder, inputs, period="Invented year 2"))
        staged = stage_cycle(config)
        history_when_staged = (folder / "history" / "cycles.json").read_text()
        staged_site = _bytes_of(folder / "staged" / "site")
        sign_off(config, SIGNER, "2026-12-04", "invented review")
        promote(config)
    return folder, config, staged, history_when_staged, staged_site


def test_nothing_of_a_preview_reaches_the_public_site_or_the_history(promoted, inputs):
    folder, config, staged, _, _ = promoted
    planted = pd.read_csv(inputs / "cohort.csv")["stay_id"].tolist()
    assert len(planted) > 2000
    previews = folder / "staged" / "previews"
    # the previews hold the planted ids, so the search below searches for something real
    held = "".join(p.read_text(encoding="utf-8") for p in previews.rglob("records.csv"))
    assert sum(i in held for i in planted[:50]) == 50
    public = [folder / "site", folder / "history"]
    for root in public:
        assert not (root / "previews").exists()
        for path in root.rglob("*"):
            if path.is_file():
                data = path.read_bytes()
                assert b"PLANTED-" not in data, path
                assert PREVIEW_MARK.encode() not in data, path
    # and the previews are not inside the output or the history at all
    assert not previews.resolve().is_relative_to((folder / "site").resolve())
    # the disclosure rules still apply to the public table
    table = pd.read_csv(folder / "site" / "downloads" / "results.csv")
    small = table["count_status"] == "small"
    assert small.any() and table.loc[small, "observed"].isna().all()


def test_each_preview_is_its_own_units_confidential_page_and_records(promoted, inputs):
    folder, config, _, _, _ = promoted
    cohort = pd.read_csv(inputs / "cohort.csv", dtype={"unit_id": str})
    units = pd.read_csv(inputs / "units.csv")
    previews = folder / "staged" / "previews"
    assert len(list(previews.iterdir())) == len(units)
    addresses = json.loads((folder / "staged" / "record" / "addresses.json").read_text())
    for _, unit in units.iterrows():
        where = previews / addresses[unit["id"]]
        page = (where / "index.html").read_text(encoding="utf-8")
        assert f"CONFIDENTIAL: for {unit['name']}" in page.replace("&#39;", "'")
        records = read_ledger(where / "records.csv")
        own = set(cohort.loc[cohort["unit_id"] == unit["id"], "stay_id"])
        # every record of its own, per patient-level measure, and nobody else's
        assert set(records["record_id"]) == own
        assert len(records) == 2 * len(own)  # readmission and length of stay
        # its public page travels with it, with what that page needs to display
        copy = next((where / "site" / "units").glob("*.html"))
        assert copy.read_bytes() == (folder / "site" / "units" / copy.name).read_bytes()
        assert (where / "site" / "assets" / "fairgauge.css").is_file()


def test_counted_records_add_up_to_the_published_counts(promoted):
    """Per unit and measure: counted records = cases, their outcomes = observed, their expected
    values = expected, in the staged history record and, where shown, in the public download."""
    folder, _, _, _, _ = promoted
    ledger = read_ledger(folder / "staged" / "ledger.csv")
    counted = ledger[ledger["status"] == "counted"]
    sums = counted.groupby(["measure", "unit_id"]).agg(
        cases=("record_id", "size"), observed=("outcome", "sum"), expected=("expected", "sum")
    )
    record = pd.read_csv(folder / "staged" / "record" / "results.csv", dtype={"unit_id": str})
    public = pd.read_csv(folder / "site" / "downloads" / "results.csv", dtype={"unit_id": str})
    pd.testing.assert_frame_equal(record, public)
    for key, row in sums.iterrows():
        shown = public.set_index(["measure", "unit_id"]).loc[key]
        if shown["status"] != "reported":
            continue
        assert shown["cases"] == row["cases"], key
        assert shown["expected"] == pytest.approx(row["expected"], rel=1e-5), key  # %.6g
        if not np.isnan(shown["observed"]):
            assert shown["observed"] == pytest.approx(row["observed"], rel=1e-5), key
    left = ledger[ledger["status"] == "left out"]
    assert len(left) == 4 and set(left["measure"]) == {"readmit30"}
    assert (left["reason"] == "missing risk factor: emergency").all()
    imputed = ledger[ledger["reason"].str.contains("imputed")]
    assert len(imputed) == 4 and set(imputed["measure"]) == {"stay"}
    # a preview's counts agree with its records
    some = next((folder / "staged" / "previews").iterdir())
    counts = pd.read_csv(some / "counts.csv").set_index("measure")
    mine = read_ledger(some / "records.csv")
    readmit = mine[mine["measure"] == "readmit30"]
    assert counts.loc["readmit30", "cases"] == (readmit["status"] == "counted").sum()
    assert counts.loc["readmit30", "left_out"] == (readmit["status"] == "left out").sum()
    assert np.isnan(counts.loc["pressure", "records"])  # unit totals: no records


def test_the_published_site_is_the_reviewed_one_and_sha256sum_agrees(promoted):
    folder, config, staged, history_when_staged, staged_site = promoted
    published = _bytes_of(folder / "site")
    signoff = json.loads(published.pop("fairgauge-signoff.json"))
    placeholder = json.loads(staged_site.pop("fairgauge-signoff.json"))
    assert published == staged_site and "not signed off" in placeholder["status"]
    assert signoff["reviewed_sha256"] == staged.digest
    assert (
        signoff["sign_offs"][0]["signers"] == [{"name": SIGNER[0][0], "role": SIGNER[0][1]}]
        and signoff["sign_offs"][0]["date"] == "2026-12-04"
    )
    # The recipe in the record, with coreutils only (outside check: GNU sha256sum's output
    # format "<hash>  <name>" per line).
    listing = subprocess.run(
        "find . -type f ! -path ./fairgauge-signoff.json -printf '%P\\n' | LC_ALL=C sort | "
        "xargs sha256sum | sha256sum",
        shell=True,
        cwd=folder / "site",
        capture_output=True,
        text=True,
        check=True,
    )
    assert listing.stdout.split()[0] == signoff["reviewed_sha256"]
    # the methods page says so, and its link to the sign-off record works
    methods = (folder / "site" / "methods.html").read_text(encoding="utf-8")
    assert "Preview and sign-off" in methods and 'href="fairgauge-signoff.json"' in methods


def test_the_history_changes_only_when_the_cycle_is_published(promoted):
    folder, _, _, history_when_staged, _ = promoted
    before = [e["period"] for e in json.loads(history_when_staged)]
    after = json.loads((folder / "history" / "cycles.json").read_text())
    assert before == ["Invented year 1"]
    assert [e["period"] for e in after] == ["Invented year 1", "Invented year 2"]
    manifest = json.loads(
        (folder / "history" / after[1]["key"] / "manifest.json").read_text(encoding="utf-8")
    )
    assert manifest["review"]["sign_off"]["sign_offs"][0]["signers"][0]["role"] == SIGNER[0][1]


def test_unsigned_altered_or_stale_builds_are_refused_and_nothing_changes(inputs, tmp_path):
    config = load_config(_config(tmp_path, inputs, review='sign_off_roles = ["Legal"]'))
    stage_cycle(config)
    site, history = tmp_path / "site", tmp_path / "history"
    with pytest.raises(ReviewError, match="has not been signed off"):
        promote(config)
    assert not site.exists() and not history.exists()
    sign_off(config, SIGNER, "2026-12-04", "")
    with pytest.raises(ReviewError, match="needs sign-off by Legal"):
        promote(config)
    sign_off(config, [("B. Counsel (invented)", "legal")], "2026-12-05", "roles ignore case")
    page = next((tmp_path / "staged" / "site" / "units").glob("*.html"))
    original = page.read_bytes()
    page.write_bytes(original.replace(b"</main>", b"<p>edited after review</p></main>"))
    for step in (lambda: promote(config), lambda: sign_off(config, SIGNER, "2026-12-05", "")):
        with pytest.raises(ReviewError, match=f"altered after staging .*units/{page.name}"):
            step()
    assert not site.exists() and not history.exists()
    page.write_bytes(original)
    extra = tmp_path / "staged" / "site" / "extra.html"
    extra.write_text("<p>added</p>", encoding="utf-8")
    with pytest.raises(ReviewError, match="extra.html"):
        promote(config)
    extra.unlink()
    results = tmp_path / "staged" / "record" / "results.csv"
    kept = results.read_bytes()
    results.write_bytes(kept.replace(b"reported", b"REPORTED", 1))
    with pytest.raises(ReviewError, match="staged record .* results.csv"):
        promote(config)
    results.write_bytes(kept)
    # another cycle published after staging: the staged comparisons are stale
    other = load_config(_config(tmp_path / "other", inputs, period="Invented year 0"))
    run_cycle(other)
    assert other.cycle.history != config.cycle.history
    shutil.copytree(tmp_path / "other" / "history", history)
    with pytest.raises(ReviewError, match="history .* changed after this cycle was staged"):
        promote(config)
    shutil.rmtree(history)
    done = promote(config)
    assert (done.site / "fairgauge-signoff.json").is_file()
    # a config for another period, or staging again, needs a new sign-off
    later = load_config(_config(tmp_path, inputs, period="Invented year 2"))
    with pytest.raises(ReviewError, match="is of period 'Invented year 1'"):
        promote(later)
    stage_cycle(config)
    with pytest.raises(ReviewError, match="has not been signed off"):
        promote(config)
    # the review says this period is public already and what promotion would change in it:
    # nothing, for the same inputs and seed
    review = tmp_path / "staged" / "review"
    page = (review / "index.html").read_text(encoding="utf-8")
    assert "This period is already public" in page and "replaces the results" in page
    assert "No earlier period has been published" in page
    assert pd.read_csv(review / "replaced.csv").empty


def test_a_corrected_input_shows_what_changed_between_staged_builds(inputs, tmp_path):
    config_path = _config(tmp_path, inputs)
    first = stage_cycle(load_config(config_path))
    assert not first.corrections
    sign_off(load_config(config_path), SIGNER, "2026-12-04", "")
    cohort = pd.read_csv(tmp_path / "cohort.csv", dtype={"unit_id": str})
    flipped, removed = PLANT.format(10), PLANT.format(11)
    cohort.loc[cohort["stay_id"] == flipped, "readmit30"] = (
        1 - cohort.loc[cohort["stay_id"] == flipped, "readmit30"]
    )
    unit = cohort.loc[cohort["stay_id"] == removed, "unit_id"].item()
    cohort = cohort[cohort["stay_id"] != removed]
    cohort.to_csv(tmp_path / "cohort.csv", index=False)
    second = stage_cycle(load_config(config_path))
    assert second.corrections and second.digest != first.digest
    review = tmp_path / "staged" / "review"
    records = pd.read_csv(review / "corrected_records.csv")
    whats = set(zip(records["record_id"], records["measure"], records["what"], strict=True))
    assert whats == {
        (flipped, "readmit30", "outcome changed"),
        (removed, "readmit30", "record removed"),
        (removed, "stay", "record removed"),
    }
    values = pd.read_csv(review / "corrected_values.csv", dtype={"unit_id": str})
    cases = values[(values["unit_id"] == unit) & (values["value"] == "cases")]
    assert set(cases["measure"]) == {"readmit30", "stay"}
    assert (cases["before"] - cases["now"] == 1).all()
    page = (review / "index.html").read_text(encoding="utf-8")
    assert "Inputs changed: cohort.csv" in page and "record removed" in page
    staged = json.loads((tmp_path / "staged" / "fairgauge-staged.json").read_text())
    assert staged["sign_offs"] == []  # the corrected build is signed off afresh


def test_the_review_summary_lists_changes_since_the_published_cycle(promoted):
    folder, _, _, _, _ = promoted
    page = (folder / "staged" / "review" / "index.html").read_text(encoding="utf-8")
    assert "Compared with Invented year 1" in page and "already public" not in page
    assert "none found" in page and "within the limits" in page and "FAILED" not in page
    changed = pd.read_csv(folder / "staged" / "review" / "since_published.csv")
    assert list(changed.columns) == ["measure", "unit_id", "unit_name", "what", "before", "now"]


def test_a_site_that_would_show_a_record_id_is_not_staged(inputs, tmp_path):
    """A fault planted on purpose: a unit named like one of the records. The leak search finds it
    and the last good staging is left as it was."""
    config = load_config(_config(tmp_path, inputs))
    stage_cycle(config)
    before = content_hash(tmp_path / "staged")
    units = pd.read_csv(tmp_path / "units.csv")
    units.loc[2, "name"] = PLANT.format(5)
    units.to_csv(tmp_path / "units.csv", index=False)
    with pytest.raises(ReviewError, match=f"record id {PLANT.format(5)}"):
        stage_cycle(load_config(tmp_path / "cycle.toml"))
    assert content_hash(tmp_path / "staged") == before
    assert [p.name for p in tmp_path.iterdir() if ".tmp-" in p.name] == []


def test_required_review_blocks_direct_builds_and_staging_must_be_apart(inputs, tmp_path):
    config = load_config(_config(tmp_path, inputs, review="required = true"))
    with pytest.raises(ReviewError, match="fairgauge stage"):
        run_cycle(config)
    assert not (tmp_path / "site").exists()
    for inside in ("site/staged", "history", "."):
        path = _config(tmp_path / "bad", inputs)
        text = path.read_text().replace("staging = 'staged'", f"staging = '{inside}'")
        path.write_text(text, encoding="utf-8")
        with pytest.raises(ConfigError, match="review.staging: .* overlaps cycle"):
            load_config(path)


def test_the_three_commands(inputs, tmp_path, capsys):
    path = _config(tmp_path, inputs, review="required = true\nmethods_note = false")
    assert main(["build", str(path)]) == 6
    assert main(["promote", str(path)]) == 6
    assert "nothing is staged" in capsys.readouterr().err
    assert main(["stage", str(path)]) == 0
    out = capsys.readouterr().out
    assert "previews: 14" in out and "the history is unchanged" in out
    assert "Preview and sign-off" not in (tmp_path / "staged/site/methods.html").read_text()
    signer = ["--signer", "C. Lead (invented)", "Communications"]
    assert main(["sign-off", str(path), *signer, "--date", "4 Dec"]) == 6
    assert "is not a date" in capsys.readouterr().err
    assert main(["sign-off", str(path), *signer, "--note", "invented"]) == 0
    assert main(["promote", str(path)]) == 0
    assert "published the signed-off build" in capsys.readouterr().out
    assert (tmp_path / "site" / "index.html").is_file()
