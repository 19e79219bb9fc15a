"""Confidential unit previews: one self-contained folder per unit, beside (never inside) the staged
site.

``previews/<address>/`` holds ``index.html`` (a confidential banner, the unit's exact counts by
measure and its records, counted and left out with the reason), ``records.csv`` and
``counts.csv``, and ``site/``: a copy of the unit's public page as it would be published with the
style sheets, scripts and figures it uses, at the same relative paths. Every preview page carries
:data:`PREVIEW_MARK`; the staging step proves that neither the mark nor any record id is in the
site (:func:`leaks`).
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import jinja2
import pandas as pd

from pipeline import templates_path
from pipeline.config import CycleConfig
from pipeline.results import MeasureResult
from pipeline.staging.ledger import COUNTED, LEFT_OUT, unit_counts

PREVIEW_MARK = "fairgauge-confidential-unit-preview"  # in every preview page, never in the site
# files a page uses (style, script, images); other pages it links to are not copied
_USED = re.compile(r'(?:src|href)="(?![a-z]+:|#|/)([^"#?]+\.(?:css|js|svg|png|jpg|webp|woff2?))"')
# record ids long and distinctive enough to search the site for (short or plain numbers would
# match counts and dates)
_SEARCHABLE = re.compile(r"(?=.*[A-Za-z])[\w.-]{5,}")


def environment() -> jinja2.Environment:
    return jinja2.Environment(
        loader=jinja2.FileSystemLoader(templates_path() / "html"),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        keep_trailing_newline=True,
    )


def write_previews(
    folder: Path,
    site: Path,
    config: CycleConfig,
    units: pd.DataFrame,
    results: list[MeasureResult],
    ledger: pd.DataFrame,
    addresses: dict[str, str],
    staged: str,
    digest: str,
) -> int:
    """One preview per unit in the unit table into ``folder``; returns how many."""
    template = environment().get_template("preview.html.j2")
    by_unit = dict(iter(ledger.groupby("unit_id", sort=False)))
    for uid, unit in units.iterrows():
        where = folder / addresses[uid]
        where.mkdir(parents=True)
        mine = by_unit.get(uid, ledger.iloc[0:0])
        counts = unit_counts(uid, ledger, results)
        mine.to_csv(where / "records.csv", index=False, float_format="%.6g")
        counts.to_csv(where / "counts.csv", index=False, float_format="%.6g")
        page = _copy_page(site, f"units/{addresses[uid]}.html", where / "site")
        text = template.render(
            mark=PREVIEW_MARK,
            unit={"id": uid, "name": unit["name"]},
            period=config.cycle.period,
            publisher=config.cycle.publisher,
            staged=staged,
            digest=digest,
            page=page,
            counts=[_shown(c) for c in counts.to_dict("records")],
            small_below=config.reporting.hide_counts_below,
            minimum_cases=config.reporting.minimum_cases,
            measures=[_records(r, mine) for r in results],
        )
        (where / "index.html").write_text(text, encoding="utf-8")
    return len(units)


def _records(result: MeasureResult, mine: pd.DataFrame) -> dict:
    m = result.measure
    if result.row_expected is None:
        return {"name": m.name, "totals": m.summary or "a database query"}
    rows = mine[mine["measure"] == m.key]
    counted = rows[rows["status"] == COUNTED]
    return {
        "name": m.name,
        "totals": "",
        "counted": len(counted),
        "left": rows[rows["status"] == LEFT_OUT][["record_id", "reason"]].to_dict("records"),
        "rows": [
            {**x, "outcome": f"{x['outcome']:g}", "expected": f"{x['expected']:.4g}"}
            for x in counted[["record_id", "outcome", "expected", "reason"]].to_dict("records")
        ],
    }


def _shown(counts: dict) -> dict:
    def text(x) -> str:
        if pd.isna(x):
            return ""
        return f"{x:.2f}" if isinstance(x, float) and not float(x).is_integer() else f"{x:g}"

    return {k: text(v) if not isinstance(v, str) else v for k, v in counts.items()}


def _copy_page(site: Path, page: str, into: Path) -> str:
    """Copy ``page`` of ``site`` and the files it uses into ``into`` (same relative paths);
    return the copy's path relative to the preview folder."""
    source = site / page
    copied = [page]
    text = source.read_text(encoding="utf-8")
    base = Path(page).parent
    for ref in set(_USED.findall(text)):
        target = (base / ref).as_posix()
        resolved = (site / target).resolve()
        if resolved.is_file() and resolved.is_relative_to(site.resolve()):
            copied.append(resolved.relative_to(site.resolve()).as_posix())
    for name in copied:
        (into / name).parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(site / name, into / name)
    return f"{into.name}/{page}"


def searchable_ids(ledger: pd.DataFrame) -> set[str]:
    """The record ids the site is searched for (see :data:`_SEARCHABLE`)."""
    ids = ledger["record_id"].dropna().astype(str).unique()
    return {i for i in ids if _SEARCHABLE.fullmatch(i)}


def leaks(site: Path, ids: set[str]) -> tuple[int, list[str]]:
    """Search every text file of ``site`` for the preview mark and the record ids: (files
    searched, findings as "file: what")."""
    found, searched = [], 0
    tokens = re.compile(r"[\w-]+(?:\.[\w-]+)*")
    for path in sorted(p for p in site.rglob("*") if p.is_file()):
        try:
            text = path.read_text(encoding="utf-8")
        except (UnicodeDecodeError, OSError):
            continue  # images: never written from records
        searched += 1
        where = path.relative_to(site).as_posix()
        if PREVIEW_MARK in text:
            found.append(f"{where}: the preview mark")
        hits = {t for t in tokens.findall(text) if t in ids}
        found += [f"{where}: record id {h}" for h in sorted(hits)[:5]]
    return searched, found
