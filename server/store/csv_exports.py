"""CSV downloads of a session: its trials (one column per value, times to the millisecond),
its events (as stored) and its choices in the format `vigil fit` reads."""

from __future__ import annotations

import csv
import json
from collections.abc import Iterable, Sequence
from typing import Any, TextIO

from server.store import rows
from server.store.dialect import Connection
from server.store.export_reads import trial_table
from server.store.history import PastTrial, trial_history

CHOICE_COLUMNS = ("animal", "session", "trial", "choice", "reward")  # DESIGN.md: what `vigil fit` reads
# ... and what it reads of two-stage trials (`transition` common or rare, `choice2` empty for a
# single response; a missed second stage is not expressible here, the store keeps it)
TWO_STAGE_CHOICE_COLUMNS = ("animal", "session", "trial", "choice", "transition", "state", "choice2", "reward")


def choice_lines(past: Iterable[PastTrial]) -> tuple[tuple[str, ...], list[tuple]]:
    """The fitting format's header and rows for these trials: the two-stage one when any
    trial has a second stage. One function for the downloads and the rehearsal's export."""
    past = list(past)
    if not any(p.second is not None for p in past):
        rows = [(p.animal, p.session_id, p.trial, None if p.omission or not p.choice else p.choice, p.reward or 0.0)
                for p in past]  # fmt: skip
        return CHOICE_COLUMNS, rows
    two: list[tuple] = []
    for p in past:
        second = p.second
        if p.omission or not p.choice or second is None:
            two.append((p.animal, p.session_id, p.trial, None, None, None, None, p.reward or 0.0))
            continue
        transition = "common" if second.common else "rare"
        reward = float(p.reward or 0)
        two.append((p.animal, p.session_id, p.trial, p.choice, transition, second.state, second.choice, reward))
    return TWO_STAGE_CHOICE_COLUMNS, two


def write_choice_csv(past: Iterable[PastTrial], fileobj: TextIO) -> int:
    """These trials in the fitting format (see `choice_lines`); returns the rows written."""
    header, lines = choice_lines(past)
    return _write_csv(lines, header, fileobj)


def _write_csv(cursor: Iterable[Sequence[Any]], header: Sequence[str], fileobj: TextIO) -> int:
    # None becomes an empty field.
    writer = csv.writer(fileobj, lineterminator="\n")
    writer.writerow(header)
    count = 0
    for row in cursor:
        writer.writerow(["" if value is None else value for value in row])
        count += 1
    return count


def is_time_column(name: str) -> bool:
    """Seconds by the store's naming: t, t_start, latency_s, iti_s, first_s.<input>, steps.<step>."""
    head = name.split(".", 1)[0]
    return head == "t" or head.startswith("t_") or head.endswith("_s") or head == "steps"


def _ms(value: Any) -> Any:
    return f"{value:.3f}" if isinstance(value, float) else value


def _spread(name: str, value: Any) -> dict[str, Any]:
    """A JSON trial column as plain columns: a mapping's keys (nested values stay JSON) and
    the steps' entry times (the first entry of each step)."""
    if name == "counts" and isinstance(value, dict):
        # Each key is step.input (Session._respond); `responses.INPUT` sums an input over the steps.
        totals: dict[str, Any] = {}
        for key, count in value.items():
            what = f"responses.{key.rsplit('.', 1)[-1]}"
            totals[what] = totals.get(what, 0) + count
        return {f"counts.{k}": v for k, v in value.items()} | totals
    if isinstance(value, dict):
        return {
            f"{name}.{k}": json.dumps(v, sort_keys=True) if isinstance(v, dict | list) else v for k, v in value.items()
        }
    if name == "steps" and isinstance(value, list):
        first: dict[str, Any] = {}
        for step, t in value:
            first.setdefault(f"steps.{step}", t)
        return first
    return {name: None if value is None else json.dumps(value, sort_keys=True)}


def export_trials_csv(conn: Connection, session_id: int, fileobj: TextIO) -> int:
    """Write the session's trials as CSV; return the row count.

    Every column of the trials table, whatever migrations added; JSON columns are spread
    into one column per key (`counts.offer.press_east` and the input's total over the trial's
    steps `responses.press_east`, `first_s...`, `steps.offer` its entry time, `extra...`),
    absent keys left empty (counts: 0); seconds are rounded to the millisecond."""
    columns, found = trial_table(conn, session_id)
    names = [name for name, _ in columns]
    header: dict[str, None] = {}
    out: list[dict[str, Any]] = []
    for raw in found:
        row: dict[str, Any] = {"session_id": session_id}
        for name, value in zip(names, raw):
            if name in rows.JSON_COLUMNS:
                row.update(_spread(name, rows.from_json(value)))
            else:
                row[name] = value
        header.update(dict.fromkeys(row))
        out.append(row)
    if not out:
        header = dict.fromkeys(["session_id", *(n for n in names if n not in rows.JSON_COLUMNS)])
    fields = list(header)
    zero = [f for f in fields if f.startswith(("counts.", "responses."))]  # no response there is 0, not unknown
    for r in out:
        r.update({f: 0 for f in zero if f not in r})
    cells = ([_ms(r.get(f)) if is_time_column(f) else r.get(f) for f in fields] for r in out)
    return _write_csv(cells, fields, fileobj)


def export_events_csv(conn: Connection, session_id: int, fileobj: TextIO) -> int:
    """Write the session's events as CSV in stored order (JSON detail as its text); return the row count."""
    cursor = conn.execute(
        f"SELECT {', '.join(rows.EVENT_COLUMNS)} FROM events WHERE session_id = ? ORDER BY id",
        (session_id,),
    )
    return _write_csv(cursor, rows.EVENT_COLUMNS, fileobj)


def export_choices_csv(
    conn: Connection, fileobj: TextIO, *, animal: str | None = None, session_id: int | None = None
) -> int:
    """Write trials in the fitting format `animal,session,trial,choice,reward` (DESIGN.md):
    every trial of the animal (or of one session, or of every animal), sessions in the
    order they started. An omission has an empty choice, as `vigil fit --db` reads it;
    reward is the pellets delivered in the trial."""
    if session_id is not None and animal is None:
        owner = conn.execute("SELECT animal FROM sessions WHERE id = ?", (session_id,)).fetchone()
        if owner is None:
            return _write_csv((), CHOICE_COLUMNS, fileobj)
        animal = str(owner[0])
    past = trial_history(conn, animals=None if animal is None else [animal], two_stage=True)
    if session_id is not None:
        past = [p for p in past if p.session_id == session_id]
    past.sort(key=lambda p: p.animal)  # stable: each animal's trials stay in session order
    return write_choice_csv(past, fileobj)
