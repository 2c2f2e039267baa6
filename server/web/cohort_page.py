"""The animals list and the cohort page (every animal that ran one protocol, overlaid with
the cohort's median and spread by session number)."""

from __future__ import annotations

import sqlite3
from typing import Any

from server.store import queries
from server.web import day_plots
from server.web.animal_page import session_row
from server.web.markup import Safe, el
from server.web.overview import animal_href
from server.web.tables import cohort_href, percent, table, when


def animals_body(animals: list[dict[str, Any]]) -> Safe:
    rows = [
        [
            el("a", a["animal"], href=animal_href(a["animal"])),
            a["sessions"],
            when(a["first_at"])[:10],
            when(a["last_at"])[:10],
            a["box"],
            [el("a", p, href=cohort_href(p), class_="cohort") for p in a["protocols"]],
        ]
        for a in animals
    ]
    return el(
        "div",
        el("h1", "Animals"),
        table(["animal", "sessions", "first", "last", "last box", "protocols (cohort pages)"], rows, cls="tbl animals")
        if rows
        else el("p", "No sessions yet.", class_="note"),
        class_="animals",
    )


def cohort_rows(conn: sqlite3.Connection, protocol: str) -> dict[str, list[dict[str, Any]]]:
    """The protocol's sessions by animal, each animal's oldest first."""
    by_animal: dict[str, list[dict[str, Any]]] = {}
    for row in queries.protocol_history(conn, protocol):
        by_animal.setdefault(row["animal"], []).append(session_row(conn, row))
    return by_animal


def cohort_body(protocol: str, by_animal: dict[str, list[dict[str, Any]]]) -> Safe:
    panels = []
    measures = (
        ("accuracy", "Accuracy by session number", "each animal's fraction correct; 0.5 = chance with two options",
         (0.0, 1.0), [0.0, 0.25, 0.5, 0.75, 1.0]),
        ("pca", "PCA index by session number", "+1 = sign-tracking, −1 = goal-tracking", (-1.0, 1.0),
         [-1.0, -0.5, 0.0, 0.5, 1.0]),
        ("reversals", "Reversals by session number", "reversals each animal earned in the session", None, None),
        ("rewards", "Rewards by session number", "pellets delivered per session", None, None),
    )  # fmt: skip
    for key, title, subtitle, y_range, y_ticks in measures:
        series = {a: [s.get(key) for s in rows] for a, rows in by_animal.items()}
        values = [v for vs in series.values() for v in vs if v is not None]
        if not values or (key == "reversals" and not any(values)):
            continue
        if y_range is None:
            y_range = (0.0, max(values + [1]) * 1.08)
        counts = key in ("reversals", "rewards")
        panels.append(
            day_plots.cohort_panel(
                series, title=title, subtitle=subtitle, y_range=y_range, y_ticks=y_ticks, counts=counts
            )
        )
    rows = [
        [
            el("a", animal, href=animal_href(animal)),
            len(sessions),
            when(sessions[-1]["started_at"])[:10],
            percent(sessions[-1]["accuracy"]),
            "–" if sessions[-1]["pca"] is None else f"{sessions[-1]['pca']:+.2f}",
            sum(s["reversals"] for s in sessions),
            sum(s["rewards"] for s in sessions),
        ]
        for animal, sessions in by_animal.items()
    ]
    header = ["animal", "sessions", "last", "last accuracy", "last PCA", "reversals", "rewards"]
    if all(row[4] == "–" for row in rows):  # not a Pavlovian protocol: no PCA column
        header.pop(4)
        rows = [row[:4] + row[5:] for row in rows]
    return el(
        "div",
        el("h1", "Cohort: ", el("span", protocol)),
        el("p", f"{len(by_animal)} animal(s) that ran this protocol; session 1 is each animal's first.", class_="note"),
        el("div", panels, class_="panels"),
        table(header, rows, cls="tbl cohort"),
        class_="cohort-page",
    )
