"""Each animal's trial history across sessions, as plain data: what the estimator replays
at the start of a session, what `vigil fit --db` fits and what the choices CSV exports.

One query for all three, so they cannot disagree about which trials an animal has had or
in which order (sessions in the order they started, trials in order within each).
"""

from __future__ import annotations

from collections.abc import Collection, Sequence
from dataclasses import dataclass

from server.engine.records import SecondStage
from server.store import rows
from server.store.dialect import Connection


@dataclass(frozen=True, slots=True)
class PastTrial:
    animal: str
    session_id: int
    trial: int
    choice: str | None  # as stored: None (or empty) when no option was chosen
    reward: float | None  # pellets delivered
    omission: bool
    second: SecondStage | None = None  # two-stage trials, when asked for


def trial_history(
    conn: Connection,
    *,
    animals: Sequence[str] | None = None,
    protocol: str | None = None,
    trial_types: Collection[str] | None = None,
    ended_sessions_only: bool = False,
    whole_trials_only: bool = False,
    two_stage: bool = False,
) -> list[PastTrial]:
    """Trials of the given animals (every animal when None), optionally only of one protocol,
    of some trial types, of sessions that have ended, or not interrupted. Only the columns
    a filter names are read beyond the choice table's own, so a database holding just those
    (an export, a hand-made one) can be read too; `two_stage` reads each trial's second stage."""
    where: list[str] = []
    params: list[object] = []
    if animals:
        where.append(f"s.animal IN ({','.join('?' * len(animals))})")
        params += list(animals)
    if protocol is not None:
        where.append("s.protocol = ?")
        params.append(protocol)
    if trial_types is not None:
        kinds = sorted(trial_types)
        where.append(f"t.trial_type IN ({','.join('?' * len(kinds))})")
        params += kinds
    if ended_sessions_only:
        where.append("s.end_reason IS NOT NULL")
    if whole_trials_only:
        where.append("t.interrupted = 0")
    second = ", t.state, t.transition, t.choice2, t.response2, t.latency2_s, t.omitted2" if two_stage else ""
    sql = (
        f"SELECT s.animal, t.session_id, t.trial, t.choice, t.reward, t.omission{second}"
        " FROM trials t JOIN sessions s ON s.id = t.session_id"
        + (" WHERE " + " AND ".join(where) if where else "")
        + " ORDER BY s.started_at, s.id, t.trial"
    )
    found = conn.execute(sql, params).fetchall()
    if not two_stage:
        return [PastTrial(str(a), int(sid), int(n), c, r, bool(o)) for a, sid, n, c, r, o in found]
    names = ("state", "transition", "choice2", "response2", "latency2_s", "omitted2")
    return [
        PastTrial(str(a), int(sid), int(n), c, r, bool(o), rows.second_from_row(dict(zip(names, rest))))
        for a, sid, n, c, r, o, *rest in found
    ]
