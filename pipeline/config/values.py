"""Checks of single config values: each returns None when the value is allowed, else why not."""

from __future__ import annotations

import difflib
import re
from collections.abc import Callable, Iterable
from dataclasses import MISSING, field
from typing import Any

from pipeline.families import OUTCOME_TYPES

Check = Callable[[Any], "str | None"]


def close_match(name: str, allowed: Iterable[str]) -> str:
    """' Did you mean ...?' when ``name`` is close to one of ``allowed``, else ''."""
    close = difflib.get_close_matches(name, list(allowed), n=1, cutoff=0.6)
    return f" Did you mean '{close[0]}'?" if close else ""


def option(default: Any = MISSING, doc: str = "", check: Check | None = None) -> Any:
    """Declare one config key: its default (none = required), its meaning and its check."""
    return field(default=default, metadata={"doc": doc, "check": check})


def between(lo: float, hi: float, *, inclusive: bool = True) -> Check:
    def check(value: float) -> str | None:
        ok = lo <= value <= hi if inclusive else lo < value < hi
        if ok:
            return None
        bracket = "from {} to {}" if inclusive else "strictly between {} and {}"
        return f"must be {bracket.format(lo, hi)}; got {value}"

    return check


_FILE_NAME = re.compile(r"^[a-z0-9][a-z0-9_-]{0,39}$")


def file_name(value: str) -> str | None:
    if _FILE_NAME.match(value):
        return None
    return (
        f"'{value}' is not allowed: use 1-40 lower-case letters, digits, '-' or '_', "
        "starting with a letter or digit (it becomes a file name)"
    )


def nonempty(value: str) -> str | None:
    return None if value.strip() else "must not be empty"


SHORT_TITLE = 32  # characters beside six navigation items in a 1280 px bar (a judgement)


def short_title(value: str) -> str | None:
    if len(value) <= SHORT_TITLE:
        return None
    return (
        f"must be at most {SHORT_TITLE} characters (it goes in the navigation bar); "
        f"got {len(value)}"
    )


def site_url(value: str) -> str | None:
    if value == "" or (re.fullmatch(r"https?://[^\s\"'<>]+/", value)):
        return None
    return (
        "must be empty or a full address starting with http:// or https:// and ending "
        f"with '/'; got '{value}'"
    )


def benchmark_value(value: str | float) -> str | None:
    if isinstance(value, str):
        return (
            None
            if value == "network"
            else f"must be \"network\" or a rate between 0 and 1; got '{value}'"
        )
    return (
        None
        if 0 < value < 1
        else f"a fixed benchmark rate must be strictly between 0 and 1; got {value}"
    )


def threshold_value(value: str | float) -> str | None:
    if isinstance(value, str):
        return (
            None
            if value == "network"
            else f"must be \"network\" or a risk between 0 and 1; got '{value}'"
        )
    return (
        None if 0 < value < 1 else f"a risk threshold must be strictly between 0 and 1; got {value}"
    )


def formula_rhs(value: str) -> str | None:
    if "~" in value:
        return (
            "give only the right-hand side of the formula (no '~'); the outcome comes from "
            "'outcome'"
        )
    return nonempty(value)


def outcome_type(value: str) -> str | None:
    if value in OUTCOME_TYPES:
        return None
    return (
        f"'{value}' is not an outcome type fairgauge fits. Allowed: "
        f"{', '.join(OUTCOME_TYPES)}.{close_match(value, OUTCOME_TYPES)}"
    )
