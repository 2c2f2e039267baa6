"""What each record becomes in the database: the statements that store it, not yet run.

Pure: no connection here, so the writer decides when a batch is committed. Written in the
SQL that SQLite and PostgreSQL both accept (`ON CONFLICT`, `RETURNING`, `CASE` for a
scalar max); `server.store.dialect` swaps the placeholders for psycopg.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from server.engine.records import BlockStarted, EventLogged, RuleFired, TrialRecord
from server.store import rows

INSERT_TRIAL = (
    f"INSERT INTO trials ({', '.join(rows.TRIAL_COLUMNS)}) VALUES ({', '.join('?' * len(rows.TRIAL_COLUMNS))})"
)
COUNT_TRIAL = (
    "UPDATE sessions SET trials = CASE WHEN trials > ? THEN trials ELSE ? END, rewards = rewards + ? WHERE id = ?"
)
INSERT_RULE_FIRING = "INSERT INTO rule_firings (session_id, trial, t, rule, actions, reads) VALUES (?, ?, ?, ?, ?, ?)"
INSERT_BLOCK = (
    f"INSERT INTO blocks ({', '.join(rows.BLOCK_COLUMNS)}) VALUES ({', '.join('?' * len(rows.BLOCK_COLUMNS))})"
)
UPSERT_ESTIMATE = (
    "INSERT INTO estimates (session_id, trial, model, data) VALUES (?, ?, ?, ?)"
    " ON CONFLICT (session_id, trial) DO UPDATE SET model = excluded.model, data = excluded.data"
)
INSERT_ANNOTATION = (
    "INSERT INTO annotations (session_id, t, wall_time, origin, text) VALUES (?, ?, ?, ?, ?) RETURNING id"
)
_SESSION_COLUMNS = "box, animal, protocol, protocol_path, protocol_sha256, started_at, seed, settings, rig"
INSERT_SESSION = f"INSERT INTO sessions ({_SESSION_COLUMNS}) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?) RETURNING id"
INSERT_SESSION_WITH_ID = f"INSERT INTO sessions (id, {_SESSION_COLUMNS}) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)"
INSERT_OUTBOX = "INSERT INTO outbox (statement, params) VALUES (?, ?)"
INSERT_STAGE = (
    "INSERT INTO stage_log (animal, stage, protocol, at, session_id, reason, evidence) VALUES (?, ?, ?, ?, ?, ?, ?)"
)


@dataclass(frozen=True, slots=True)
class Pending:
    """Statements for one record, not yet committed; `what` names it in error messages."""

    session_id: int
    what: str
    statements: tuple[tuple[str, tuple], ...]
    device_event: bool = False


def event(session_id: int, record: EventLogged) -> Pending:
    return Pending(
        session_id,
        f"{record.kind} event of session {session_id}",
        ((rows.INSERT_EVENT, rows.event_params(session_id, record)),),
        device_event=record.device_seq is not None,
    )


def trial(session_id: int, record: TrialRecord) -> Pending:
    """The trial row and the session's running counts, in one unit."""
    counts = (record.trial, record.trial, int(bool(record.rewarded)), session_id)
    return Pending(
        session_id,
        f"trial {record.trial} of session {session_id}",
        ((INSERT_TRIAL, rows.trial_params(session_id, record)), (COUNT_TRIAL, counts)),
    )


def block(session_id: int, record: BlockStarted) -> Pending:
    return Pending(
        session_id,
        f"block {record.block_index} of session {session_id}",
        ((INSERT_BLOCK, rows.block_params(session_id, record)),),
    )


def rule_firing(session_id: int, record: RuleFired) -> Pending:
    params = (
        session_id,
        rows.integer(record.trial, "trial"),
        rows.real(record.t, "rule t"),
        str(record.rule),
        rows.to_json(list(record.actions), f"actions of rule {record.rule}"),
        rows.to_json(dict(record.values), f"values read by rule {record.rule}"),
    )
    return Pending(session_id, f"firing of rule {record.rule} in session {session_id}", ((INSERT_RULE_FIRING, params),))


def session_end(session_id: int, ended_at: str, reason: str, trials: int, rewards: int) -> Pending:
    params = (ended_at, str(reason), rows.integer(trials, "trials"), rows.integer(rewards, "rewards"), session_id)
    return Pending(session_id, f"end of session {session_id}", ((rows.END_SESSION, params),))


def estimate(session_id: int, trial: int, model: str, data: Mapping[str, Any]) -> Pending:
    params = (
        rows.integer(session_id, "session id"),
        rows.integer(trial, "trial"),
        str(model),
        rows.to_json(dict(data), f"estimate after trial {trial}"),
    )
    return Pending(session_id, f"estimate after trial {trial} of session {session_id}", ((UPSERT_ESTIMATE, params),))


def stage(
    animal: str,
    stage: int,
    protocol: str,
    at: str,
    reason: str,
    session_id: int | None,
    evidence: Mapping[str, Any] | None,
) -> Pending:
    params = (
        str(animal),
        rows.integer(stage, "stage"),
        str(protocol),
        at,
        session_id,
        str(reason),
        rows.to_json(dict(evidence or {}), "stage evidence"),
    )
    owner = session_id if session_id is not None else 0
    return Pending(owner, f"stage {stage} of animal {animal}", ((INSERT_STAGE, params),))
