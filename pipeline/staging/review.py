"""The review summary of a staged cycle: what changed since the last published cycle, what changed
since the previous staged build (corrections), the warnings and the checks that passed.

It is written for the team that signs off (``review/index.html`` in the staging folder, with its
tables as CSV beside it) and is never published.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline.cycle import BuiltCycle
from pipeline.history import PastCycle, changes, published_cycle
from pipeline.results import MeasureResult
from pipeline.staging.previews import PREVIEW_MARK, environment
from pipeline.website.markup import value, value_span

REVIEW_ROWS = 200  # rows of a table shown on the review page (all of them are in its CSV)
LARGEST_MOVES = 5  # per measure, the units whose adjusted value moved most since the last cycle
# public values compared between two staged builds (corrections)
COMPARED = [
    "status",
    "count_status",
    "cases",
    "observed",
    "expected",
    "rsr_median",
    "rsr_lower",
    "rsr_upper",
    "group",
    "rank_median",
]


def since_published(table: pd.DataFrame, previous: PastCycle | None) -> pd.DataFrame:
    """Every unit whose public state, group or median rank differs from the last published
    cycle (units in both)."""
    columns = ["measure", "unit_id", "unit_name", "what", "before", "now"]
    if previous is None:
        return pd.DataFrame(columns=columns)
    old = previous.table.set_index(["measure", "unit_id"])
    rows = []
    for _, now in table.iterrows():
        key = (now["measure"], now["unit_id"])
        if key not in old.index:
            continue
        before = old.loc[key]
        for what, column in (
            ("public state", "status"),
            ("group", "group"),
            ("rank", "rank_median"),
        ):
            a, b = before[column], now[column]
            if _differs(a, b):
                rows.append([*key, now["unit_name"], what, _text(a), _text(b)])
    return pd.DataFrame(rows, columns=columns)


def largest_moves(results: list[MeasureResult], previous: PastCycle | None) -> list[dict]:
    """Per measure, the reported units whose adjusted value moved most (on the ratio scale) since
    the last published cycle, with the chance that it is higher now."""
    if previous is None:
        return []
    moved = changes(results, previous)
    out = []
    for r in results:
        rows = moved[moved["measure"] == r.measure.key] if len(moved) else moved
        if not len(rows):
            continue
        size = np.abs(np.log(rows["now"].astype(float) / rows["before"].astype(float)))
        rows = rows.assign(size=size)
        top = rows[rows["size"] > 0].sort_values("size", ascending=False).head(LARGEST_MOVES)
        if not len(top):
            continue
        out.append(
            {
                "name": r.measure.name,
                "rows": [
                    {
                        "unit": x["unit_name"],
                        "before": f"{value(r.measure, x['before'])} "
                        f"({value_span(r.measure, x['before_lower'], x['before_upper'])})",
                        "now": f"{value(r.measure, x['now'])} "
                        f"({value_span(r.measure, x['now_lower'], x['now_upper'])})",
                        "chance": f"{x['p_higher'] * 100:.0f}%",
                    }
                    for _, x in top.iterrows()
                ],
            }
        )
    return out


def corrections(
    old_table: pd.DataFrame | None,
    new_table: pd.DataFrame,
    old_ledger: pd.DataFrame | None,
    new_ledger: pd.DataFrame,
) -> tuple[pd.DataFrame, pd.DataFrame] | None:
    """Between the previous staged build of this period and this one: (public values that
    changed, records that changed); None when there is no previous staged build to compare."""
    if old_table is None or old_ledger is None:
        return None
    values = []
    old = old_table.set_index(["measure", "unit_id"])
    for _, now in new_table.iterrows():
        key = (now["measure"], now["unit_id"])
        before = old.loc[key] if key in old.index else None
        for column in COMPARED:
            a = None if before is None else before[column]
            if before is None or _differs(a, now[column]):
                values.append([*key, now["unit_name"], column, _text(a), _text(now[column])])
    values_table = pd.DataFrame(
        values, columns=["measure", "unit_id", "unit_name", "value", "before", "now"]
    )
    return values_table, record_changes(old_ledger, new_ledger)


def record_changes(old: pd.DataFrame, new: pd.DataFrame) -> pd.DataFrame:
    """Records added, removed, or whose status or outcome changed, per unit and measure."""
    key = ["measure", "unit_id", "record_id"]
    merged = old.merge(new, on=key, how="outer", suffixes=("_before", "_now"), indicator=True)
    what = pd.Series("", index=merged.index, dtype=object)
    what[merged["_merge"] == "left_only"] = "record removed"
    what[merged["_merge"] == "right_only"] = "record added"
    both = merged["_merge"] == "both"
    status = both & (merged["status_before"] != merged["status_now"])
    outcome = both & ~np.isclose(
        merged["outcome_before"].astype(float), merged["outcome_now"].astype(float)
    )
    what[status] = "now " + merged.loc[status, "status_now"].astype(str)
    what[outcome & ~status] = "outcome changed"
    merged["what"] = what
    changed = merged[what != ""]
    out = changed[[*key, "what", "outcome_before", "outcome_now", "reason_now"]]
    return out.rename(columns={"reason_now": "reason"}).sort_values(key).reset_index(drop=True)


def passed_checks(
    cohort_rows: int,
    units: int,
    results: list[MeasureResult],
    table: pd.DataFrame,
    scanned: tuple[int, int],
) -> list[dict]:
    """The checks this build passed, in words (a build that failed one was not staged)."""
    hidden = table["status"] != "reported"
    numeric = table.select_dtypes("number").columns
    blank = bool(table.loc[hidden, numeric].isna().all().all())
    checks = [
        {
            "check": "input",
            "result": f"{cohort_rows:,} patient rows and {units} units read and checked",
        },
        {
            "check": "disclosure",
            "result": f"{int(hidden.sum())} unit results not reported, every value of them blank "
            f"in the public table; {int((table['count_status'] == 'small').sum())} small counts "
            "shown as ranges"
            if blank
            else "FAILED: a unit that is not reported has a value in the public table",
        },
        {
            "check": "previews",
            "result": f"{scanned[0]} files of the staged site searched for the {scanned[1]:,} "
            "record ids and the preview mark: none found",
        },
    ]
    for r in results:
        d = r.diagnostics
        failures = d.failures()
        checks.append(
            {
                "check": f"sampler, {r.measure.name}",
                "result": f"largest R-hat {d.rhat_max:.3f}, smallest bulk ESS "
                f"{d.ess_bulk_min:.0f}, {d.divergences} divergences: "
                + ("within the limits" if not failures else "FAILED: " + "; ".join(failures)),
            }
        )
    return checks


def _differs(a, b) -> bool:
    if _missing(a) and _missing(b):
        return False
    if _missing(a) or _missing(b):
        return True
    if isinstance(a, int | float | np.number) and isinstance(b, int | float | np.number):
        return not math.isclose(float(a), float(b), rel_tol=1e-9, abs_tol=0.0)
    return str(a) != str(b)


def _missing(x) -> bool:
    return x is None or (not isinstance(x, str) and bool(pd.isna(x)))


def _text(x) -> str:
    if _missing(x):
        return ""
    if isinstance(x, float | np.floating):
        return f"{x:.6g}"
    return str(x)


def write_review(
    folder: Path,
    built: BuiltCycle,
    table: pd.DataFrame,
    ledger: pd.DataFrame,
    earlier: dict | None,
    scanned: tuple[int, int],
    digest: str,
) -> None:
    """``review/index.html`` and its tables as CSV (``built``: the staged BuiltCycle; ``table``:
    its public table as written to CSV; ``earlier``: the previous staged build of the period)."""
    folder.mkdir(parents=True)
    previous = built.past[-1] if built.past else None
    moved = since_published(table, previous)
    tables = {"since_published": moved}
    public = published_cycle(built.config.cycle.history, built.config.cycle.period)
    replaces = None
    if public is not None:  # promotion would replace what the public sees for this period now
        tables["replaced"] = since_published(table, public[0])
        replaces = {"published": public[1], "moved": _rows(tables["replaced"])}
    corrected = _corrected(built, table, ledger, earlier, tables)
    for name, frame in tables.items():
        frame.to_csv(folder / f"{name}.csv", index=False, float_format="%.6g")
    units = built.cohort.units
    text = (
        environment()
        .get_template("review.html.j2")
        .render(
            mark=PREVIEW_MARK,
            period=built.config.cycle.period,
            staged=built.manifest["built"],
            digest=digest,
            checks=passed_checks(len(built.cohort.rows), len(units), built.results, table, scanned),
            warnings=list(built.warnings),
            previous=previous.period if previous else "",
            moved=_rows(moved),
            replaces=replaces,
            largest=largest_moves(built.results, previous),
            corrected=corrected,
            limit=REVIEW_ROWS,
            previews=[
                {"id": uid, "name": u["name"], "address": built.addresses[uid]}
                for uid, u in units.iterrows()
            ],
        )
    )
    (folder / "index.html").write_text(text, encoding="utf-8")


def _corrected(
    built: BuiltCycle,
    table: pd.DataFrame,
    ledger: pd.DataFrame,
    earlier: dict | None,
    tables: dict[str, pd.DataFrame],
) -> dict | None:
    """What changed since the previous staged build (its tables added to ``tables``)."""
    if earlier is None:
        return None
    found = corrections(earlier["table"], table, earlier["ledger"], ledger)
    if found is None:
        return None
    tables |= {"corrected_values": found[0], "corrected_records": found[1]}
    now, before = built.manifest["input_sha256"], earlier["input_sha256"]
    inputs = sorted(n for n in now.keys() | before.keys() if now.get(n) != before.get(n))
    return {
        "staged": earlier["staged"],
        "inputs": ", ".join(inputs),
        "changed_values": _rows(found[0]),
        "changed_records": _rows(found[1]),
    }


def _rows(frame: pd.DataFrame) -> list[dict]:
    return [{k: _text(v) for k, v in row.items()} for row in frame.to_dict("records")]
