"""What the pages show of earlier cycles: each unit's published values over time, and the changes
page's blocks.
"""

from __future__ import annotations

from pipeline.config import CycleConfig
from pipeline.history import PastCycle, changes
from pipeline.results import MeasureResult
from pipeline.website.markup import chance, markdown_literal, value, value_span


def trends(
    config: CycleConfig,
    results: list[MeasureResult],
    past: list[PastCycle],
    addresses: dict[str, str],
) -> dict[str, list[dict]]:
    """Per unit, its published adjusted rates in earlier cycles and now (reported cycles only)."""
    out: dict[str, list[dict]] = {uid: [] for uid in addresses}
    for r in results:
        cycles = [(p.period, p.table[p.table["measure"] == r.measure.key]) for p in past] + [
            (config.cycle.period, r.table)
        ]
        for period, table in cycles:
            for _, row in table[table["status"] == "reported"].iterrows():
                if row["unit_id"] in out:
                    out[row["unit_id"]].append(
                        {
                            "measure": markdown_literal(r.measure.name),
                            "period": markdown_literal(period),
                            "rate": value(r.measure, row["rsr_median"]),
                            "interval": value_span(r.measure, row["rsr_lower"], row["rsr_upper"]),
                        }
                    )
    return out


def change_views(
    results: list[MeasureResult], previous: PastCycle | None, addresses: dict[str, str]
) -> list[dict]:
    """The changes page, one block per measure (empty when there is no earlier cycle)."""
    if previous is None:
        return []
    table = changes(results, previous)
    blocks = []
    for r in results:
        rows = table[table["measure"] == r.measure.key] if len(table) else table
        blocks.append(
            {
                "name": markdown_literal(r.measure.name),
                "rows": [
                    {
                        "name": markdown_literal(x["unit_name"]),
                        "href": f"units/{addresses[x['unit_id']]}.qmd",
                        "before": f"{value(r.measure, x['before'])} "
                        f"({value_span(r.measure, x['before_lower'], x['before_upper'])})",
                        "now": f"{value(r.measure, x['now'])} "
                        f"({value_span(r.measure, x['now_lower'], x['now_upper'])})",
                        "chance": chance(x["p_higher"]),
                        "words": x["words"],
                    }
                    for _, x in rows.sort_values("p_higher", ascending=False).iterrows()
                ],
            }
        )
    return blocks
