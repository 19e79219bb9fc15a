"""Staging: the whole cycle into ``[review].staging`` instead of the public output.

The staging folder, swapped in whole like a site (a failed staging leaves the last one as it
was)::

    fairgauge-staged.json   what was staged: period, hashes of site/ and record/, history state,
                            sign-offs (fairgauge sign-off), promotion time
    site/                   the site exactly as `fairgauge promote` will publish it
    record/                 its history record, entered into the history on promotion only
    ledger.csv              every record of every unit: counted or left out, and why
    review/index.html       the review summary (and its tables as CSV)
    previews/<address>/     one confidential preview per unit

Nothing here is public; the config refuses a staging folder inside the output or the history.
"""

from __future__ import annotations

import json
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from pipeline.config import CycleConfig
from pipeline.cycle import BuiltCycle, CycleRun, build_cycle, new_build_folder, publish
from pipeline.errors import ReviewError
from pipeline.history import write_record
from pipeline.progress import SILENT, Reporter
from pipeline.staging.ledger import read_ledger, record_ledger
from pipeline.staging.previews import leaks, searchable_ids, write_previews
from pipeline.staging.promote import STAGED, content_hash, history_state, read_staged, write_json
from pipeline.staging.review import write_review


@dataclass
class StagedCycle:
    folder: Path  # the staging folder
    run: CycleRun
    digest: str  # content hash of the staged site
    previews: int
    corrections: bool  # the review compares with a previous staged build of this period


def stage_cycle(
    config: CycleConfig,
    reporter: Reporter = SILENT,
    strict: bool = False,
    renderer: str | None = None,
    no_cache: bool = False,
) -> StagedCycle:
    """Run the cycle into the staging folder with its review summary and unit previews; publish
    nothing and leave the history alone."""
    start = time.perf_counter()
    staging = config.review.staging
    earlier = _earlier_build(staging, config.cycle.period)
    built = build_cycle(config, staging, reporter, strict, renderer, no_cache, staged=True)
    folder = None
    try:
        folder = new_build_folder(staging)
        shutil.move(str(built.build), folder / "site")
        digest, corrected = _fill(folder, built, earlier, reporter)
    except BaseException:
        shutil.rmtree(built.build, ignore_errors=True)
        if folder is not None:
            shutil.rmtree(folder, ignore_errors=True)
        raise
    publish(folder, staging, marker=STAGED, setting="[review].staging")
    run = built.run(staging / "site", time.perf_counter() - start)
    return StagedCycle(staging, run, digest, len(built.cohort.units), corrected)


def _fill(
    folder: Path, built: BuiltCycle, earlier: dict | None, reporter: Reporter
) -> tuple[str, bool]:
    """Write the record, ledger, leak check, previews, review and staging record into the new
    staging ``folder`` (which holds ``site/``)."""
    config = built.config
    site = folder / "site"
    write_record(folder / "record", built.table, built.results, built.manifest, built.addresses)
    reporter.stage("listing every unit's records (counted and left out)")
    ledger = record_ledger(built.cohort, built.results)
    ledger.to_csv(folder / "ledger.csv", index=False, float_format="%.10g")
    ledger = read_ledger(folder / "ledger.csv")  # as the next staging will read it back
    ids = searchable_ids(ledger)
    searched, found = leaks(site, ids)
    if found:
        raise ReviewError(
            "the staged site holds what only the previews may: "
            + "; ".join(found[:10])
            + ". Nothing was staged; report this as a fairgauge bug."
        )
    digest, files = content_hash(site)
    record_digest, record_files = content_hash(folder / "record")
    staged_at = built.manifest["built"]
    reporter.stage(f"writing {len(built.cohort.units)} confidential unit previews")
    write_previews(
        folder / "previews",
        site,
        config,
        built.cohort.units,
        built.results,
        ledger,
        built.addresses,
        staged_at,
        digest,
    )
    reporter.stage("writing the review summary")
    table = pd.read_csv(folder / "record" / "results.csv", dtype={"unit_id": "string"})
    write_review(folder / "review", built, table, ledger, earlier, (searched, len(ids)), digest)
    record = {
        "period": config.cycle.period,
        "config_sha256": config.sha256,
        "staged": staged_at,
        "site_sha256": digest,
        "record_sha256": record_digest,
        "files": files,
        "record_files": record_files,
        "history": history_state(config.cycle.history),
        "sign_offs": [],  # staging again drops the sign-offs of the build it replaces
        "promoted": None,
    }
    write_json(folder / STAGED, record)
    return digest, earlier is not None


def _earlier_build(staging: Path, period: str) -> dict | None:
    """The previous staged build of ``period`` (for the corrections view): its public table,
    ledger and when it was staged; None when there is none."""
    staged = read_staged(staging)
    if staged is None or staged.get("period") != period:
        return None
    try:
        return {
            "staged": staged["staged"],
            "table": pd.read_csv(staging / "record" / "results.csv", dtype={"unit_id": "string"}),
            "ledger": read_ledger(staging / "ledger.csv"),
            "input_sha256": _manifest_inputs(staging),
        }
    except (OSError, ValueError, KeyError):
        return None


def _manifest_inputs(staging: Path) -> dict:
    manifest = json.loads((staging / "record" / "manifest.json").read_text("utf-8"))
    return manifest.get("input_sha256", {})
