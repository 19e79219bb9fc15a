"""Cycle history: every published cycle's results, kept so the next cycle can show change.

``<history>/cycles.json`` lists cycles in the order they were first published; each cycle's
folder holds its public results table, its manifest and thinned posterior draws of every
unit's risk-standardised rate (not published; needed to say how sure a change is). A rebuilt
cycle replaces its own entry and keeps its place in the order.
"""

from __future__ import annotations

import dataclasses
import json
import os
import re
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline.errors import RenderError
from pipeline.results import MeasureResult

# Words for a change between cycles, by the posterior probability that the rate is higher now.
CLEAR_RISE, CLEAR_FALL = 0.95, 0.05
CHANGE_WORDS = (
    (CLEAR_RISE, "Probably higher than last cycle"),
    (CLEAR_FALL, "No clear change"),
    (-1.0, "Probably lower than last cycle"),
)


def cycle_key(period: str) -> str:
    return re.sub(r"[^a-z0-9]+", "-", period.lower()).strip("-")[:80] or "cycle"


@dataclass(frozen=True)
class PastCycle:
    key: str
    period: str
    table: pd.DataFrame  # the public results table as published
    draws: dict[str, pd.DataFrame]  # measure key -> draws x unit ids (risk-standardised rate)
    # unit id -> page address as published
    addresses: dict[str, str] = dataclasses.field(default_factory=dict)


def _index(folder: Path) -> list[dict]:
    path = folder / "cycles.json"
    return json.loads(path.read_text("utf-8")) if path.is_file() else []


def previous_cycle(folder: Path, period: str) -> PastCycle | None:
    """The cycle published before ``period`` (or the latest one, for a new period)."""
    entries = _index(folder)
    keys = [e["key"] for e in entries]
    here = cycle_key(period)
    earlier = entries[: keys.index(here)] if here in keys else entries
    if not earlier:
        return None
    return load_cycle(folder, earlier[-1])


def past_cycles(folder: Path, period: str) -> list[PastCycle]:
    """Every cycle published before ``period``, oldest first (for trends)."""
    entries = _index(folder)
    keys = [e["key"] for e in entries]
    here = cycle_key(period)
    return [
        load_cycle(folder, e) for e in (entries[: keys.index(here)] if here in keys else entries)
    ]


def published_cycle(folder: Path, period: str) -> tuple[PastCycle, str] | None:
    """The published build of ``period`` itself and when it was first published, if there is
    one (a new build of the period replaces it)."""
    for entry in _index(folder):
        if entry["key"] == cycle_key(period):
            return load_cycle(folder, entry), entry.get("first_published", "")
    return None


def load_cycle(folder: Path, entry: dict) -> PastCycle:
    where = folder / entry["key"]
    try:
        table = pd.read_csv(where / "results.csv", dtype={"unit_id": "string"})
        with np.load(where / "draws.npz", allow_pickle=False) as stored:
            draws = {
                m: pd.DataFrame(
                    stored[f"{m}.draws"], columns=[str(u) for u in stored[f"{m}.units"]]
                )
                for m in {name.split(".")[0] for name in stored.files}
            }
    except (OSError, ValueError, KeyError) as exc:
        raise RenderError(
            f"the history of cycle '{entry['period']}' in {where} cannot be read ({exc}). "
            f"Restore it or remove it from {folder / 'cycles.json'}."
        ) from None
    path = where / "addresses.json"
    addresses = json.loads(path.read_text("utf-8")) if path.is_file() else {}
    return PastCycle(entry["key"], entry["period"], table, draws, addresses)


def kept_addresses(past: list[PastCycle]) -> dict[str, str]:
    """Every unit's page address as last published, so a unit keeps its address from cycle to
    cycle."""
    out: dict[str, str] = {}
    for cycle in past:  # oldest first: later cycles win
        out.update(cycle.addresses)
    return out


def record_cycle(
    folder: Path,
    period: str,
    table: pd.DataFrame,
    results: list[MeasureResult],
    manifest: dict,
    addresses: dict[str, str] | None = None,
) -> None:
    """Store a just-published cycle (replacing an earlier build of the same period)."""
    folder.mkdir(parents=True, exist_ok=True)
    written = Path(tempfile.mkdtemp(prefix=f".{cycle_key(period)}.tmp-", dir=folder))
    try:
        write_record(written, table, results, manifest, addresses)
    except BaseException:
        shutil.rmtree(written, ignore_errors=True)
        raise
    enter_record(folder, period, written, manifest["built"])


def write_record(
    where: Path,
    table: pd.DataFrame,
    results: list[MeasureResult],
    manifest: dict,
    addresses: dict[str, str] | None = None,
) -> None:
    """Write a cycle's history record (results, manifest, addresses, draws) into the folder
    ``where``; a staged cycle keeps it until it is published (:func:`enter_record`)."""
    where.mkdir(parents=True, exist_ok=True)
    table.to_csv(where / "results.csv", index=False, float_format="%.6g")
    (where / "manifest.json").write_text(json.dumps(manifest, indent=2), encoding="utf-8")
    (where / "addresses.json").write_text(
        json.dumps(addresses or {}, indent=2, sort_keys=True), encoding="utf-8"
    )
    arrays = {}
    for r in results:
        arrays[f"{r.measure.key}.draws"] = r.rsr_draws.to_numpy()
        arrays[f"{r.measure.key}.units"] = np.array(r.rsr_draws.columns, dtype=str)
    np.savez_compressed(where / "draws.npz", **arrays)


def enter_record(folder: Path, period: str, written: Path, published: str) -> None:
    """Move the record folder ``written`` (inside ``folder``) into the history as the cycle
    ``period``, replacing an earlier build of it; a new period is added at the end."""
    key = cycle_key(period)
    target = folder / key
    try:
        if target.exists():
            shutil.rmtree(target)
        os.replace(written, target)
    except BaseException:
        shutil.rmtree(written, ignore_errors=True)
        raise
    entries = _index(folder)
    if key not in [e["key"] for e in entries]:
        entries.append({"key": key, "period": period, "first_published": published})
        index = folder / "cycles.json"
        index.with_suffix(".tmp").write_text(json.dumps(entries, indent=2), encoding="utf-8")
        os.replace(index.with_suffix(".tmp"), index)


def changes(results: list[MeasureResult], previous: PastCycle) -> pd.DataFrame:
    """Per measure and unit reported in both cycles: both rates and P(rate is higher now)."""
    rows = []
    for r in results:
        before = previous.draws.get(r.measure.key)
        if before is None:
            continue
        old = previous.table[
            (previous.table["measure"] == r.measure.key) & (previous.table["status"] == "reported")
        ].set_index("unit_id")
        now = r.table[r.table["status"] == "reported"].set_index("unit_id")
        for uid in now.index.intersection(old.index):
            if uid not in before.columns or uid not in r.rsr_draws.columns:
                continue
            a, b = r.rsr_draws[uid].to_numpy(), before[uid].to_numpy()
            k = min(len(a), len(b))  # draws of independent fits, paired by position
            # ties count one half
            p_higher = float(np.mean(a[:k] > b[:k]) + 0.5 * np.mean(a[:k] == b[:k]))
            rows.append(
                {
                    "measure": r.measure.key,
                    "unit_id": uid,
                    "unit_name": now.loc[uid, "unit_name"],
                    "before": old.loc[uid, "rsr_median"],
                    "before_lower": old.loc[uid, "rsr_lower"],
                    "before_upper": old.loc[uid, "rsr_upper"],
                    "now": now.loc[uid, "rsr_median"],
                    "now_lower": now.loc[uid, "rsr_lower"],
                    "now_upper": now.loc[uid, "rsr_upper"],
                    "p_higher": p_higher,
                    "words": next(w for limit, w in CHANGE_WORDS if p_higher > limit),
                }
            )
    return pd.DataFrame(rows)
