"""An attacker for the small-count rule: reads everything a built site publishes and tries to work
hidden counts back.

It knows nothing of ``pipeline`` (it reads only files, with the standard library, pandas and NumPy),
so a mistake in the pipeline's own bookkeeping cannot hide a leak from it. What it is given, as a
reader would be: the published rule (threshold and publication minimum, printed on the methods
page). What it is given that no reader has: the true counts, only to say whether a value it worked
out is right.

Hidden values it attacks, per cycle, measure and unit:

* the count of patients with the outcome (``observed``) of a unit whose count is small, or hidden to
  protect one, or of a unit whose numbers are withheld;
* the number of patients (``cases``) of a unit whose numbers are withheld.

Routes (each tried on every hidden value it applies to; ``Report.tries`` counts them):

``field``
    the value itself in a download (csv, json, a cycle's history table);
``rate``
    raw rate x cases: every whole number k with k / cases rounding to the published rate;
``ratio``
    O/E x expected, the same way;
``weight``
    the share of own data, which with the published between-unit SD gives the count back (treated
    as a leak when published at all: counted, not solved);
``cell``
    a table cell under an Observed, Raw, O/E or Own data heading, in the unit's row of the
    measure's page or the measure's row of the unit's page (tables of numbers, figure data tables,
    the Quarto sources' pipe tables), solved as above;
``words``
    a sentence, alt text, title or search-index entry that names the unit and says "k of n" (or "k
    among n", "k out of n", "k/n") with n its published cases;
``total``
    the network's published total minus every count shown: an exact audit (every whole number each
    hidden count can take, given the ranges a reader knows and that they add up to the total), by
    dynamic programming over sums, not the pipeline's interval arithmetic (a count worked out to be
    zero is not counted: the rule shows zeros);
``cases total``
    the same for withheld units' cases, from the network's published number of patients;
``... (other cycle)``
    the field, rate, ratio and weight routes on another cycle's tables that carry this cycle's
    period in a ``period`` column, and the words route on another cycle's sentences that name this
    cycle's period (a later site re-publishing an earlier cycle's counts).

What it does not try, and why: inverting the model (adjusted values blend the unit's count with the
network's; :func:`guess_by_inversion` measures how often a best guess is right, since such a guess
cannot be confirmed from the site); network-level tables (risk groups of the case-mix fit's
calibration, which pool patients of every unit); subtotals by unit kind (the site publishes none).
"""

from __future__ import annotations

import html
import io
import json
import math
import re
from dataclasses import dataclass, field
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd

TEXT_SUFFIXES = {".html", ".svg", ".js", ".json", ".qmd", ".md", ".yml", ".txt", ".xml", ".csv"}
BLOCK_TAGS = {
    "p",
    "li",
    "td",
    "th",
    "caption",
    "figcaption",
    "h1",
    "h2",
    "h3",
    "h4",
    "h5",
    "h6",
    "div",
    "section",
    "dt",
    "dd",
    "title",
    "text",
    "desc",
    "summary",
    "tr",
    "table",
    "article",
    "header",
    "footer",
    "nav",
    "br",
}
ATTRIBUTES = {"alt", "title", "aria-label", "content", "data-label"}
NUMBER = r"\d[\d,]*"


# ---------------------------------------------------------------------------- reading what is
# published


class _Page(HTMLParser):
    """Text fragments (one per block, attribute or SVG text) and tables (header cells, body rows) of
    one page."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.fragments: list[str] = []
        self.tables: list[dict] = []
        self._text: list[str] = []
        self._stack: list[dict] = []  # open tables
        self._cell: list[str] | None = None
        self._skip = 0

    def _flush(self):
        text = " ".join("".join(self._text).split())
        if text:
            self.fragments.append(text)
        self._text = []

    def handle_starttag(self, tag, attrs):
        for name, value in attrs:
            if name in ATTRIBUTES and value:
                self.fragments.append(" ".join(html.unescape(value).split()))
        if tag in ("script", "style"):
            self._skip += 1
        if tag in BLOCK_TAGS:
            self._flush()
        if tag == "table":
            self._stack.append({"header": [], "rows": [], "row": None, "in_head": False})
        elif self._stack:
            t = self._stack[-1]
            if tag == "thead":
                t["in_head"] = True
            elif tag == "tr":
                t["row"], t["heads"] = [], True
            elif tag in ("td", "th"):
                self._cell = []
                t["heads"] = t.get("heads", True) and tag == "th"

    def handle_endtag(self, tag):
        if tag in ("script", "style"):
            self._skip = max(0, self._skip - 1)
        if tag in BLOCK_TAGS:
            self._flush()
        if not self._stack:
            return
        t = self._stack[-1]
        if tag in ("td", "th") and self._cell is not None and t["row"] is not None:
            t["row"].append(" ".join("".join(self._cell).split()))
            self._cell = None
        elif tag == "tr" and t["row"] is not None:
            if t["in_head"] or (not t["header"] and not t["rows"] and t.get("heads")):
                t["header"] = t["row"]
            else:
                t["rows"].append(t["row"])
            t["row"] = None
        elif tag == "thead":
            t["in_head"] = False
        elif tag == "table":
            self.tables.append(self._stack.pop())

    def handle_data(self, data):
        if self._skip:
            return
        self._text.append(data)
        if self._cell is not None:
            self._cell.append(data)

    def close(self):
        super().close()
        self._flush()


def _js_string(body: str) -> str:
    try:
        return json.loads(f'"{body}"')
    except ValueError:
        return body


def _markdown_tables(text: str) -> list[dict]:
    """Pipe tables of a Quarto source: header cells and body rows."""
    tables, lines = [], text.splitlines()
    i = 0
    while i < len(lines) - 1:
        if lines[i].lstrip().startswith("|") and re.match(r"^\s*\|?\s*:?-{3,}", lines[i + 1]):
            cells = lambda line: [c.strip() for c in line.strip().strip("|").split("|")]  # noqa: E731
            header, rows, j = cells(lines[i]), [], i + 2
            while j < len(lines) and lines[j].lstrip().startswith("|"):
                rows.append(cells(lines[j]))
                j += 1
            tables.append({"header": header, "rows": rows})
            i = j
        else:
            i += 1
    return tables


@dataclass
class Published:
    """Everything one built site publishes, as a reader gets it."""

    site: Path
    tables: list[tuple[str, pd.DataFrame]] = field(default_factory=list)  # downloads: (file, table)
    # (file, text fragments, tables)
    pages: list[tuple[str, list[str], list[dict]]] = field(default_factory=list)


def _json_tables(data) -> list[pd.DataFrame]:
    """Every list of records inside a JSON document, as tables."""
    out = []
    if isinstance(data, list) and data and all(isinstance(r, dict) for r in data):
        out.append(pd.DataFrame(data))
    items = data.values() if isinstance(data, dict) else data if isinstance(data, list) else []
    for v in items:
        if isinstance(v, (dict, list)):
            out.extend(_json_tables(v))
    return out


def _strings(data) -> list[str]:
    if isinstance(data, str):
        return [data]
    if isinstance(data, dict):
        return [s for v in data.values() for s in _strings(v)]
    if isinstance(data, list):
        return [s for v in data for s in _strings(v)]
    return []


def read_site(site: Path, extra_tables: list[Path] = ()) -> Published:
    """Read every text file under ``site`` (the Quarto sources too) and any extra tables (a cycle's
    history)."""
    out = Published(site)
    for path in sorted(p for p in site.rglob("*") if p.is_file()):
        name = path.relative_to(site).as_posix()
        if path.suffix not in TEXT_SUFFIXES:
            continue
        text = path.read_text("utf-8", errors="replace")
        if path.suffix == ".csv":
            out.tables.append(
                (name, pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False))
            )
        elif path.suffix == ".json":
            data = json.loads(text)
            out.tables.extend((name, t) for t in _json_tables(data))
            out.pages.append((name, _strings(data), []))
        elif path.suffix in (".html", ".svg"):
            page = _Page()
            page.feed(text)
            page.close()
            out.pages.append((name, page.fragments, page.tables))
        elif path.suffix == ".js":
            found = re.findall(r'"((?:[^"\\]|\\.)*)"', text)
            out.pages.append((name, [html.unescape(_js_string(s)) for s in found], []))
        else:
            fragments = [
                " ".join(line.split())
                for line in re.split(r"\n\s*\n|(?<=\.)\s", text)
                if line.strip()
            ]
            out.pages.append((name, fragments, _markdown_tables(text)))
    for path in extra_tables:
        out.tables.append((str(path), pd.read_csv(path, dtype=str, keep_default_na=False)))
    return out


# ---------------------------------------------------------------------------- working values back


def _number(text) -> float | None:
    """A published number as a reader reads it: "1,234", "4.2%", "0.93", "18 in every 1,000"; None
    if not one number."""
    if text is None:
        return None
    s = str(text).strip().replace("\u2212", "-")
    m = re.fullmatch(r"(-?[\d,]*\.?\d+)\s*(%|days?)?", s)
    if not m:
        return None
    v = float(m.group(1).replace(",", ""))
    return v / 100 if m.group(2) == "%" else v


def _decimals(text) -> int:
    s = str(text).strip().rstrip("%").replace(",", "")
    s = re.sub(r"\s*days?$", "", s)
    d = len(s.split(".")[1]) if "." in s else 0
    return d + (2 if str(text).strip().endswith("%") else 0)


def solve(published: str, divisor: float, most: int) -> list[int]:
    """Whole numbers k from 0 to ``most`` whose k / divisor, written as ``published`` is written, is
    ``published``."""
    v = _number(published)
    if v is None or not divisor or not math.isfinite(divisor):
        return []
    step = 0.5 * 10 ** -_decimals(published)
    lo, hi = (v - step) * divisor, (v + step) * divisor
    return [k for k in range(max(0, math.ceil(lo - 1e-9)), min(most, math.floor(hi + 1e-9)) + 1)]


def _csv_solve(value: str, divisor: float, most: int) -> list[int]:
    """As :func:`solve`, for a download's number (written with up to six significant digits)."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        return []
    if not divisor or not math.isfinite(v):
        return []
    digits = len(re.sub(r"[^0-9]", "", str(value).split("e")[0].lstrip("0.").lstrip("-"))) or 1
    step = 0.5 * 10 ** (math.floor(math.log10(abs(v))) - digits + 1) if v else 0.5e-6
    lo, hi = (v - step) * divisor, (v + step) * divisor
    return [k for k in range(max(0, math.ceil(lo - 1e-9)), min(most, math.floor(hi + 1e-9)) + 1)]


def feasible_values(ranges: list[list[int]], total: int) -> list[set[int]]:
    """Each hidden number's possible values when they add up to ``total`` (exact, by bitsets over
    sums)."""
    n = len(ranges)
    mask = (1 << (total + 1)) - 1

    def shift_union(reach: int, values: list[int]) -> int:
        out = 0
        for v in values:
            out |= reach << v
        return out & mask

    prefix = [1]
    for r in ranges:
        prefix.append(shift_union(prefix[-1], r))
    suffix = [0] * (n + 1)
    suffix[n] = 1
    for i in range(n - 1, -1, -1):
        suffix[i] = shift_union(suffix[i + 1], ranges[i])
    out = []
    for i in range(n):
        left, right = prefix[i], suffix[i + 1]
        others = set()
        rights = [s for s in range(total + 1) if right >> s & 1]
        for a in (s for s in range(total + 1) if left >> s & 1):
            others.update(a + b for b in rights if a + b <= total)
        out.append({v for v in ranges[i] if total - v in others})
    return out


@dataclass
class Report:
    tries: dict[str, int] = field(default_factory=dict)  # route -> attempts
    # one row per hidden value worked out exactly
    recovered: list[dict] = field(default_factory=list)
    hidden: int = 0  # hidden values attacked

    def tried(self, route: str, n: int = 1) -> None:
        self.tries[route] = self.tries.get(route, 0) + n

    def found(
        self, route: str, cycle: str, measure: str, unit: str, what: str, value, where: str
    ) -> None:
        self.recovered.append(
            {
                "route": route,
                "cycle": cycle,
                "measure": measure,
                "unit": unit,
                "what": what,
                "value": value,
                "where": where,
            }
        )

    def values(self) -> set[tuple]:
        """Distinct hidden values worked out (one value found by several routes counts once)."""
        return {(r["cycle"], r["measure"], r["unit"], r["what"]) for r in self.recovered}

    def summary(self) -> str:
        routes = ", ".join(f"{k} {v}" for k, v in sorted(self.tries.items()))
        return (
            f"{self.hidden} hidden values; {len(self.tries)} routes, "
            f"{sum(self.tries.values())} attempts ({routes}); "
            f"{len(self.values())} recovered"
        )


@dataclass(frozen=True)
class Rule:
    """The published rule, as the methods page states it."""

    # counts from 1 to threshold - 1 (of patients with the outcome, or without) are not shown
    threshold: int
    minimum: int  # units with fewer cases are not shown


def _public(published: Published) -> pd.DataFrame:
    """The site's own results download (the one with measure, unit_id and status)."""
    for name, t in published.tables:
        if name == "downloads/results.csv":
            return t
    raise AssertionError(f"{published.site}: no results download")


def _measures(published: Published) -> dict[str, dict]:
    """Per measure key: its name and the network's totals, from the json download and the measure
    page's sentence.

    The two must agree (a page and a download that disagree are a bug of their own).
    """
    out: dict[str, dict] = {}
    for name, t in published.tables:
        if name == "downloads/results.json" and {"key", "name", "events", "patients"} <= set(
            t.columns
        ):
            for r in t.to_dict("records"):
                out[r["key"]] = {
                    "name": r["name"],
                    "events": int(round(float(r["events"]))),
                    "patients": int(r["patients"]),
                }
    for name, fragments, _ in published.pages:
        key = Path(name).stem
        if name.startswith("measures/") and name.endswith(".html") and key in out:
            said = [
                re.search(rf"({NUMBER}) of ({NUMBER}) patients had this outcome", f)
                for f in fragments
            ]
            said = [m for m in said if m]
            if said:
                pair = (
                    int(said[0].group(1).replace(",", "")),
                    int(said[0].group(2).replace(",", "")),
                )
                assert pair == (out[key]["events"], out[key]["patients"]), (
                    f"{name} says {pair}; results.json says {out[key]}"
                )
    return out


def attack(
    cycles: dict[str, Published], truth: pd.DataFrame, rule: Rule, binary: set[str]
) -> Report:
    """Try every route on every hidden value of every cycle.

    ``cycles``: label -> what that cycle's site (and history) publishes, oldest first.
    ``truth``: cycle, measure, unit_id, cases, observed (the real counts, used only to judge).
    ``binary``: measures whose counts the rule covers.
    """
    report = Report()
    for cycle, published in cycles.items():
        public = _public(published)
        real = truth[truth["cycle"] == cycle].set_index(["measure", "unit_id"])
        names = dict(zip(public["unit_id"], public["unit_name"], strict=True))
        measures = _measures(published)
        for measure, rows in public.groupby("measure", sort=False):
            # counts are attacked on binary measures; withheld units' cases on every measure
            counted = measure in binary
            counts = rows[
                rows["status"].isin(["too_few", "withheld"])
                | rows["count_status"].isin(["small", "protects"])
            ]
            counts = counts if counted else counts.iloc[0:0]
            for row in counts.itertuples():
                report.hidden += 1
                k, n = (
                    int(real.loc[(measure, row.unit_id), "observed"]),
                    int(real.loc[(measure, row.unit_id), "cases"]),
                )
                for other, pub in cycles.items():
                    _attack_count(
                        report,
                        pub,
                        cycle,
                        other == cycle,
                        measure,
                        row.unit_id,
                        names[row.unit_id],
                        measures[measure]["name"],
                        k,
                        n,
                    )
            cases = rows[rows["status"].isin(["too_few", "withheld"])]
            report.hidden += len(cases)
            for row in cases.itertuples():
                n = int(real.loc[(measure, row.unit_id), "cases"])
                for name, table in published.tables:
                    if {"measure", "unit_id", "cases"} <= set(table.columns):
                        report.tried("field")
                        hit = table.loc[
                            (table["measure"] == measure) & (table["unit_id"] == row.unit_id),
                            "cases",
                        ]
                        if any(_number(v) == n for v in hit):
                            report.found("field", cycle, measure, row.unit_id, "cases", n, name)
            _attack_totals(report, cycle, measure, rows, real, measures[measure], rule, counted)
    return report


def _attack_count(
    report: Report,
    pub: Published,
    cycle: str,
    same: bool,
    measure: str,
    unit: str,
    unit_name: str,
    measure_name: str,
    k: int,
    n: int,
) -> None:
    """Routes field, rate, ratio, weight, cell and words, for one hidden count k of n patients.

    On another cycle's files (``same`` False) only what names this cycle's period can be about it: a
    table with a ``period`` column, or a sentence that names the period.
    """
    suffix = "" if same else " (other cycle)"
    for name, table in pub.tables:
        if not {"measure", "unit_id"} <= set(table.columns):
            continue
        hit = table[(table["measure"] == measure) & (table["unit_id"] == unit)]
        if not same:
            hit = hit[hit["period"] == cycle] if "period" in hit.columns else hit.iloc[0:0]
        for r in hit.to_dict("records"):
            where = name + suffix
            if "observed" in r:
                report.tried("field" + suffix)
                if _number(r["observed"]) == k:
                    report.found("field", cycle, measure, unit, "observed", k, where)
            if "raw_rate" in r:
                report.tried("rate" + suffix)
                if _csv_solve(r["raw_rate"], n, n) == [k]:
                    report.found("rate", cycle, measure, unit, "observed", k, where)
            if "oe_ratio" in r and "expected" in r:
                report.tried("ratio" + suffix)
                e = _number(r["expected"])
                if e and _csv_solve(r["oe_ratio"], e, n) == [k]:
                    report.found("ratio", cycle, measure, unit, "observed", k, where)
            if "own_weight" in r:
                report.tried("weight" + suffix)
                if _number(r["own_weight"]) is not None:
                    report.found("weight", cycle, measure, unit, "observed", k, where)
    # "k of n", not the end of "between 1 and k of n" or "fewer than k"
    exact = r"(?<!and\s)(?<!than\s)(?<!to\s)(?<![\d,.])"
    words = [
        rf"{exact}{k:,}\s+(?:of|among|out of)\s+(?:its\s+|the\s+)?{n:,}(?![\d,])",
        rf"{exact}{k}\s+(?:of|among|out of)\s+(?:its\s+|the\s+)?{n}(?![\d,])",
        rf"{exact}{k}\s*/\s*{n}(?![\d])",
    ]
    for name, fragments, tables in pub.pages:
        stem = Path(name).stem
        on_unit_page = stem == unit or stem == f"position-{unit}"
        on_measure_page = stem == measure or stem.endswith(f"-{measure}")
        for f in fragments:
            if (unit_name in f or on_unit_page) and (same or cycle in f):
                report.tried("words" + suffix)
                if any(re.search(w, f) for w in words):
                    report.found(
                        "words", cycle, measure, unit, "observed", k, f"{name}{suffix}: {f[:120]}"
                    )
        if not same:
            continue
        for t in tables:
            header = [h.lower() for h in t["header"]]
            for cells in t["rows"]:
                if not cells or not (
                    (on_measure_page and cells[0] == unit_name)
                    or (on_unit_page and cells[0] == measure_name)
                ):
                    continue
                expected = [
                    c for h, c in zip(header, cells, strict=True) if h.startswith("expected")
                ]
                e = _number(expected[0]) if expected else None
                for h, cell in zip(header, cells, strict=True):
                    if re.search(r"^observed|events|with the outcome", h):
                        report.tried("cell")
                        if _number(cell) == k:
                            report.found(
                                "cell", cycle, measure, unit, "observed", k, f"{name}: {h} = {cell}"
                            )
                    elif re.search(r"\braw\b", h):
                        report.tried("cell")
                        if solve(cell, n, n) == [k]:
                            report.found(
                                "cell", cycle, measure, unit, "observed", k, f"{name}: {h} = {cell}"
                            )
                    elif re.search(r"o/e|observed to expected|value from o", h):
                        report.tried("cell")
                        if e and solve(cell, e, n) == [k]:
                            report.found(
                                "cell", cycle, measure, unit, "observed", k, f"{name}: {h} = {cell}"
                            )
                    elif re.search(r"own data|own patients", h):
                        report.tried("cell")
                        if _number(cell) is not None:
                            report.found(
                                "weight",
                                cycle,
                                measure,
                                unit,
                                "observed",
                                k,
                                f"{name}: {h} = {cell}",
                            )


def _attack_totals(
    report: Report,
    cycle: str,
    measure: str,
    rows: pd.DataFrame,
    real: pd.DataFrame,
    totals: dict,
    rule: Rule,
    counted: bool,
) -> None:
    """Routes total and cases total: the network's published totals minus everything shown, audited
    exactly."""
    reported = rows[rows["status"] == "reported"]
    shown = reported[reported["count_status"] == "shown"]
    events, patients = totals["events"], totals["patients"]
    cases = pd.to_numeric(reported["cases"])
    smallest_cases = int(cases.min()) if len(cases) else 0
    shown_counts = pd.to_numeric(shown["observed"])
    cap = (
        int(shown_counts[shown_counts >= rule.threshold].min())
        if (shown_counts >= rule.threshold).any()
        else None
    )
    hidden, ranges = [], []
    for r in rows.itertuples():
        if r.status == "too_few":
            ranges.append(list(range(0, rule.minimum)))
        elif r.status == "withheld":
            ranges.append(list(range(0, smallest_cases + 1)))
        elif r.status != "reported":
            continue
        elif r.count_status == "small":
            ranges.append(list(range(int(float(r.observed_low)), int(float(r.observed_high)) + 1)))
        elif r.count_status == "protects":
            # not zero (zero is shown), not small, and at most the smallest count shown
            c = int(float(r.cases))
            values = [v for v in range(rule.threshold, c - rule.threshold + 1)] + [c]
            ranges.append([v for v in values if cap is None or v <= cap])
        else:
            continue
        hidden.append(r.unit_id)
    if hidden and counted:
        report.tried("total", len(hidden))
        left = events - int(shown_counts.sum())
        for unit, values in zip(hidden, feasible_values(ranges, left), strict=True):
            truth = int(real.loc[(measure, unit), "observed"])
            assert truth in values, (
                f"{cycle} {measure} {unit}: the true count {truth} is outside what the audit "
                f"allows ({sorted(values)[:5]}...): the attacker's reading of the rule is wrong"
            )
            # a zero says what a shown zero says: the rule shows zeros
            if values == {truth} and truth != 0:
                report.found(
                    "total",
                    cycle,
                    measure,
                    unit,
                    "observed",
                    truth,
                    "network total minus counts shown",
                )
    withheld = rows[rows["status"].isin(["too_few", "withheld"])]
    if len(withheld):
        report.tried("cases total", len(withheld))
        left = patients - int(cases.sum())
        top = smallest_cases
        ranges = [
            list(range(1, rule.minimum)) if s == "too_few" else list(range(rule.minimum, top + 1))
            for s in withheld["status"]
        ]
        for unit, values in zip(withheld["unit_id"], feasible_values(ranges, left), strict=True):
            truth = int(real.loc[(measure, unit), "cases"])
            assert truth in values, (
                f"{cycle} {measure} {unit}: the true cases {truth} are outside what the audit "
                "allows"
            )
            if len(values) == 1:
                report.found(
                    "cases total",
                    cycle,
                    measure,
                    unit,
                    "cases",
                    truth,
                    "network patients minus cases shown",
                )


def guess_by_inversion(
    published: Published, truth: pd.DataFrame, cycle: str, binary: set[str]
) -> dict[str, dict[str, int]]:
    """Model inversion, measured: how often a reader's best guess of a small count is right (not an
    exact recovery).

    The adjusted ratio blends a unit's count with the network's. A reader who knows the kind of
    model can fit, on the units whose counts are shown, ratio = (observed + a + c log cases) /
    (expected + b) (a gamma-Poisson shape, fitted by least squares on observed - ratio x expected =
    b ratio - a - c ratio log cases), and invert it for each small count, rounding into the
    published range. The guess cannot be confirmed from the site, so it is reported, not failed on.
    For comparison, ``baseline`` is the guess from the published expected count alone (expected x
    the median O/E of the units shown), which needs no model. Returns, per measure: {"right",
    "baseline", "small"}.
    """
    public = _public(published)
    real = truth[truth["cycle"] == cycle].set_index(["measure", "unit_id"])["observed"]
    out: dict[str, dict[str, int]] = {}
    for measure, rows in public.groupby("measure", sort=False):
        if measure not in binary:
            continue
        num = {
            c: pd.to_numeric(rows[c], errors="coerce")
            for c in (
                "cases",
                "expected",
                "ratio_median",
                "observed",
                "observed_low",
                "observed_high",
            )
        }
        shown = (rows["count_status"] == "shown").to_numpy()
        small = (rows["count_status"] == "small").to_numpy()
        if shown.sum() < 4 or not small.any():
            continue
        r, e, n = (
            num["ratio_median"].to_numpy(),
            num["expected"].to_numpy(),
            np.log(num["cases"].to_numpy()),
        )
        design = np.column_stack([r, -np.ones(len(r)), -r * n])
        coef, *_ = np.linalg.lstsq(
            design[shown], (num["observed"].to_numpy() - r * e)[shown], rcond=None
        )
        guess = np.clip(np.round(r * e + design @ coef), num["observed_low"], num["observed_high"])[
            small
        ]
        truths = np.array([real.loc[(measure, u)] for u in rows["unit_id"].to_numpy()[small]])
        ratio = np.median((num["observed"] / num["expected"]).to_numpy()[shown])
        baseline = np.clip(np.round(e * ratio), num["observed_low"], num["observed_high"])[small]
        out[measure] = {
            "right": int((guess == truths).sum()),
            "baseline": int((baseline == truths).sum()),
            "small": int(small.sum()),
        }
    return out


def counts_from_cohort(
    cohort: pd.DataFrame, unit_column: str, outcome: str, needed: list[str]
) -> pd.DataFrame:
    """True cases and events per unit from patient rows: rows with the outcome and every needed
    column recorded."""
    rows = cohort.dropna(subset=[outcome, *needed])
    grouped = rows.groupby(unit_column)[outcome]
    return pd.DataFrame(
        {
            "unit_id": grouped.size().index.astype(str),
            "cases": grouped.size().to_numpy(),
            "observed": grouped.sum().to_numpy().round().astype(int),
        }
    )
