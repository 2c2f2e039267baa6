"""The animal page: how one animal progressed day by day and what the model thinks of it.

One row per session (oldest first) with its training stage, rewards against the cap,
accuracy (or the PCA index of a Pavlovian session), reversals and trials to criterion, and
the last estimate of each model parameter; the plots across sessions are in `day_plots`.
"""

from __future__ import annotations

import sqlite3
from statistics import median
from typing import Any

from server.lab.status import reverses
from server.store import queries
from server.store.stage_log import stage_history
from server.web import day_plots
from server.web.markup import Safe, el
from server.web.overview import animal_href
from server.web.pca import classify, pca_parts
from server.web.session_protocol import protocol_of
from server.web.tables import cohort_href, percent, table, when
from server.web.tiles import rewards_text, session_limits
from server.web.words import quantity


def _params_text(params: dict[str, Any]) -> str:
    return "; ".join(f"{name} {p['mean']:.3g} [{p['low']:.3g}–{p['high']:.3g}]" for name, p in params.items()) or "–"


def reversal_figures(firings: list[dict[str, Any]]) -> dict[str, Any]:
    """Reversals of one session and the trials each took: `to_criterion` is the trial after
    which the first reversal fired, `per_reversal` the median trials from one to the next."""
    at = [row["trial"] for row in firings if reverses(row["actions"])]
    gaps = [b - a for a, b in zip([0] + at, at)]
    return {
        "reversals": len(at),
        "to_criterion": at[0] if at else None,
        "per_reversal": median(gaps) if gaps else None,
    }


def session_row(conn: sqlite3.Connection, row: dict[str, Any]) -> dict[str, Any]:
    """One history row completed with what the animal and cohort pages show of it."""
    sid = row["id"]
    settings = row.get("settings") or {}
    row["last_block"] = queries.session_status(conn, sid)["block"]
    row["stage"] = settings.get("stage")  # the training stage it ran at (None without stages)
    limits = session_limits(settings)
    row["max_rewards"] = limits.get("max_rewards")
    row.update(reversal_figures(queries.session_rule_firings(conn, sid)))
    protocol = protocol_of(row)
    pav = None if protocol is None else protocol.pavlovian
    parts = None if pav is None else pca_parts(queries.session_trials(conn, sid), pav)
    row["pca"] = None if parts is None else parts.index
    estimate = queries.last_estimate(conn, sid)
    params = {} if estimate is None else (estimate["data"] or {}).get("params") or {}
    row["fitted"] = (
        None if estimate is None else {"model": estimate["model"], "trial": estimate["trial"], "params": params}
    )
    return row


def animal_rows(conn: sqlite3.Connection, animal: str) -> list[dict[str, Any]]:
    """An animal's sessions, oldest first, each completed by `session_row`."""
    return [session_row(conn, row) for row in queries.animal_history(conn, animal)]


def stage_rows(conn: sqlite3.Connection, animal: str) -> list[dict[str, Any]]:
    """The animal's training-stage history as `vigil stages` prints it (oldest first)."""
    if not queries.table_exists(conn, "stage_log"):
        return []
    return [row for row in stage_history(conn) if row["animal"] == animal]


def _evidence(row: dict[str, Any]) -> str:
    sessions = (row.get("evidence") or {}).get("sessions") or []
    return ", ".join(
        f"session {s['session']}: {s['trials']} trials"
        + (f", {s['accuracy']:.0%} accuracy" if s.get("accuracy") is not None else "")
        for s in sessions
    )


def _stages(rows: list[dict[str, Any]]) -> Safe:
    if not rows:
        return el("p", "No training stages recorded: this animal's box has no list of stages.", class_="note")
    return table(
        ["entered", "stage", "protocol", "why", "after session", "evidence"],
        [
            [
                when(r["at"]),
                r["stage"],
                r["protocol"],
                r["reason"],
                "–" if r["session"] is None else el("a", str(r["session"]), href=f"/sessions/{r['session']}"),
                _evidence(r) or "–",
            ]
            for r in rows
        ],
    )


def _measure_text(s: dict[str, Any]) -> str:
    if s.get("pca") is not None:
        return f"PCA {s['pca']:+.2f} ({classify(s['pca'])})"
    return percent(s["accuracy"])


def _model_key(history: list[dict[str, Any]]) -> Safe | None:
    names: list[str] = []
    for s in history:
        for name in (s.get("fitted") or {}).get("params") or {}:
            if name not in names:
                names.append(name)
    if not names:
        return None
    return el(
        "dl",
        [el("div", el("dt", quantity(n)[0], " (", n, ")"), el("dd", quantity(n)[1])) for n in names],
        class_="quantities",
    )


def animal_body(animal: str, history: list[dict[str, Any]], stages: list[dict[str, Any]]) -> Safe:
    rows = [
        [
            el("a", str(s["id"]), href=f"/sessions/{s['id']}"),
            when(s["started_at"]),
            s["box"],
            el("a", s["protocol"], href=cohort_href(s["protocol"])),
            "–" if s["stage"] is None else str(s["stage"]),
            s["trials"],
            rewards_text(s["rewards"], s["max_rewards"]),
            _measure_text(s),
            s["reversals"],
            "–" if s["to_criterion"] is None else s["to_criterion"],
            s["omissions"],
            s["end_reason"] or "running",
            _params_text((s.get("fitted") or {}).get("params") or {}),
        ]
        for s in history
    ]
    header = [
        "session", "started", "box", "protocol", "stage", "trials", "rewards", "accuracy",
        "reversals", "trials to criterion", "omissions", "end", "parameters (mean [95 %])",
    ]  # fmt: skip
    return el(
        "div",
        el("h1", "Animal ", el("span", animal)),
        el(
            "p",
            el("a", "every choice, for vigil fit (CSV)", href=f"/api{animal_href(animal)}/choices.csv"),
            class_="downloads",
        ),
        el(
            "p",
            f"{len(history)} session(s) from {when(history[0]['started_at'])[:10]} to "
            f"{when(history[-1]['started_at'])[:10]}",
            class_="note",
        ),
        el("div", day_plots.animal_panels(history), class_="panels"),
        el("h2", "Sessions"),
        el("div", table(header, rows, cls="tbl sessions-of-animal"), class_="wide-table"),
        _model_key(history),
        el("h2", "Training stages"),
        _stages(stages),
        class_="animal-page",
    )
