"""Small pieces every page of sessions and animals prints the same way: tables, times,
percentages, links to animals and cohorts."""

from __future__ import annotations

from datetime import datetime
from typing import Any
from urllib.parse import quote

from server.web.markup import Safe, el


def when(iso: str | None) -> str:
    """An ISO 8601 time as people read it: date, time to the second, UTC offset."""
    if not iso:
        return "–"
    try:
        moment = datetime.fromisoformat(iso)
    except ValueError:
        return iso
    return moment.isoformat(sep=" ", timespec="seconds")


def percent(fraction: float | None) -> str:
    return "–" if fraction is None else f"{100 * fraction:.0f}\u202f%"


def table(header: list[str], rows: list[list[Any]], *, cls: str = "tbl") -> Safe:
    return el(
        "table",
        el("thead", el("tr", [el("th", h, scope="col") for h in header])),
        el("tbody", [el("tr", [el("td", c) for c in row]) for row in rows]),
        class_=cls,
    )


def cohort_href(protocol: str) -> str:
    return "/cohorts/" + quote(protocol, safe="")
