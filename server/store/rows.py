"""Records to table rows and back; the one place that knows how each column is encoded.

Floats go to REAL columns and through JSON unchanged (IEEE doubles, shortest repr), so a
trial read back equals the trial written, which lets the estimator replay stored sessions.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from datetime import datetime
from typing import Any

from server.engine.records import BlockStarted, EventLogged, SecondStage, TrialRecord
from server.store.errors import StoreError

TRIAL_COLUMNS = (
    "session_id",
    "trial",
    "block",
    "block_index",
    "trial_type",
    "t_start",
    "t_end",
    "choice",
    "response",
    "latency_s",
    "rewarded",
    "reward",
    "correct",
    "omission",
    "interrupted",
    "iti_s",
    "steps",
    "counts",
    "first_s",
    "extra",
    # two-stage trials (NULL otherwise): where the first choice led and what followed
    "state",
    "transition",
    "choice2",
    "response2",
    "latency2_s",
    "omitted2",
)
EVENT_COLUMNS = (
    "id",
    "session_id",
    "kind",
    "name",
    "value",
    "t",
    "device_t_us",
    "device_seq",
    "detail",
)
BLOCK_COLUMNS = (
    "session_id",
    "block_index",
    "block",
    "t_start",
    "contingencies",
    "outcomes_withheld",
)
SESSION_COLUMNS = (
    "id",
    "box",
    "animal",
    "protocol",
    "protocol_path",
    "protocol_sha256",
    "started_at",
    "ended_at",
    "end_reason",
    "seed",
    "trials",
    "rewards",
    "settings",
)

# Columns holding JSON text, and 0/1 columns read back as bools, per table.
JSON_COLUMNS = frozenset(("settings", "steps", "counts", "first_s", "extra", "detail", "contingencies", "data"))
BOOL_COLUMNS = frozenset(("rewarded", "correct", "omission", "interrupted", "outcomes_withheld", "omitted2"))
TRANSITIONS = ("common", "rare")

SQLITE_INT_MAX = 2**63 - 1

# Shared by the writer and crash recovery. OR IGNORE + the partial unique index on
# (session_id, device_seq) drops a replayed device event.
INSERT_EVENT = (
    "INSERT INTO events (session_id, kind, name, value, t, device_t_us, device_seq,"
    " detail) VALUES (?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT DO NOTHING"
)
END_SESSION = "UPDATE sessions SET ended_at = ?, end_reason = ?, trials = ?, rewards = ? WHERE id = ?"


def to_json(value: Any, what: str) -> str:
    """Compact JSON; numpy scalars and tuples are accepted, anything else is an error."""
    try:
        return json.dumps(value, separators=(",", ":"), allow_nan=False, default=_plain)
    except (TypeError, ValueError) as err:
        raise StoreError(f"{what} cannot be stored as json: {err}") from None


def _plain(value: Any) -> Any:
    tolist = getattr(value, "tolist", None)  # numpy arrays and scalars
    if callable(tolist):
        return tolist()
    raise TypeError(f"{type(value).__name__} is not json serialisable")


def from_json(text: str | None) -> Any:
    return None if text is None else json.loads(text)


def parse_wall_time(text: str, what: str) -> datetime:
    """An ISO 8601 time that carries its UTC offset (naive times are ambiguous across labs)."""
    try:
        moment = datetime.fromisoformat(text)
    except (TypeError, ValueError):
        raise StoreError(f"{what} is not an ISO 8601 time: {text!r}") from None
    if moment.utcoffset() is None:
        raise StoreError(f"{what} has no UTC offset: {text!r}")
    return moment


def label(value: Any, what: str) -> str:
    """A name as stored: any text but NUL, which PostgreSQL's text cannot hold (refused on
    both backends alike, so a spool never keeps what its server would refuse)."""
    text = str(value)
    if "\x00" in text:
        raise StoreError(f"{what} contains a NUL character: {text!r}")
    return text


def opt_label(value: Any, what: str) -> str | None:
    return None if value is None else label(value, what)


def real(value: Any, what: str) -> float:
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise StoreError(f"{what} must be a number, got {value!r}") from None
    if not math.isfinite(number):
        raise StoreError(f"{what} must be finite, got {value!r}")
    return number


def opt_real(value: Any, what: str) -> float | None:
    return None if value is None else real(value, what)


def integer(value: Any, what: str) -> int:
    if isinstance(value, bool) or not hasattr(value, "__index__"):
        raise StoreError(f"{what} must be an integer, got {value!r}")
    number = int(value)
    if not -SQLITE_INT_MAX - 1 <= number <= SQLITE_INT_MAX:
        raise StoreError(f"{what} does not fit a 64-bit integer: {number}")
    return number


def opt_integer(value: Any, what: str) -> int | None:
    return None if value is None else integer(value, what)


def _opt_bool(value: bool | None) -> int | None:
    return None if value is None else int(bool(value))


def trial_params(session_id: int, rec: TrialRecord) -> tuple:
    what = f"trial {rec.trial}"
    return (
        session_id,
        integer(rec.trial, "trial number"),
        label(rec.block, f"{what} block"),
        integer(rec.block_index, f"{what} block_index"),
        label(rec.trial_type, f"{what} trial_type"),
        real(rec.t_start, f"{what} t_start"),
        real(rec.t_end, f"{what} t_end"),
        opt_label(rec.choice, f"{what} choice"),
        opt_label(rec.response, f"{what} response"),
        opt_real(rec.latency_s, f"{what} latency_s"),
        int(bool(rec.rewarded)),
        real(rec.reward, f"{what} reward"),
        _opt_bool(rec.correct),
        int(bool(rec.omission)),
        int(bool(rec.interrupted)),
        real(rec.iti_s, f"{what} iti_s"),
        to_json([[name, t] for name, t in rec.steps], f"{what} steps"),
        to_json(rec.counts, f"{what} counts"),
        to_json(rec.first_s, f"{what} first_s"),
        to_json(rec.extra, f"{what} extra"),
        *_second_params(rec.second, what),
    )


def _second_params(second: SecondStage | None, what: str) -> tuple:
    if second is None:
        return (None,) * 6
    return (
        str(second.state),
        TRANSITIONS[0] if second.common else TRANSITIONS[1],
        None if second.choice is None else str(second.choice),
        None if second.response is None else str(second.response),
        opt_real(second.latency_s, f"{what} latency2_s"),
        int(bool(second.omitted)),
    )


def event_params(session_id: int, rec: EventLogged) -> tuple:
    what = f"event {rec.kind}/{rec.name}"
    return (
        session_id,
        label(rec.kind, "event kind"),
        label(rec.name, f"{what} name"),
        opt_real(rec.value, f"{what} value"),
        real(rec.t, f"{what} t"),
        opt_integer(rec.device_t_us, f"{what} device_t_us"),
        opt_integer(rec.device_seq, f"{what} device_seq"),
        None if rec.detail is None else to_json(rec.detail, f"{what} detail"),
    )


def block_params(session_id: int, rec: BlockStarted) -> tuple:
    what = f"block {rec.block_index}"
    return (
        session_id,
        integer(rec.block_index, f"{what} index"),
        label(rec.block, f"{what} name"),
        real(rec.t, f"{what} t"),
        to_json(rec.contingencies, f"{what} contingencies"),
        int(bool(rec.outcomes_withheld)),
    )


def row_dict(row: Any) -> dict[str, Any]:
    """A row as plain data for JSON and templates: JSON columns decoded, flags as bools."""
    out: dict[str, Any] = {}
    for key in row.keys():
        value = row[key]
        if key in JSON_COLUMNS:
            value = from_json(value)
        elif key in BOOL_COLUMNS and value is not None:
            value = bool(value)
        out[key] = value
    return out


def trial_from_row(row: Mapping[str, Any]) -> TrialRecord:
    """Rebuild the record exactly as it was written (for replay through a model)."""
    return TrialRecord(
        trial=row["trial"],
        block=row["block"],
        block_index=row["block_index"],
        trial_type=row["trial_type"],
        t_start=row["t_start"],
        t_end=row["t_end"],
        choice=row["choice"],
        response=row["response"],
        latency_s=row["latency_s"],
        rewarded=bool(row["rewarded"]),
        reward=row["reward"],
        correct=None if row["correct"] is None else bool(row["correct"]),
        omission=bool(row["omission"]),
        interrupted=bool(row["interrupted"]),
        iti_s=row["iti_s"],
        steps=tuple((name, t) for name, t in from_json(row["steps"])),
        counts=from_json(row["counts"]),
        first_s=from_json(row["first_s"]),
        extra=from_json(row["extra"]),
        second=second_from_row(row),
    )


def second_from_row(row: Mapping[str, Any]) -> SecondStage | None:
    """A two-stage trial's second stage from its columns; None for other trials (and for rows
    of databases from before the columns, which lack the keys)."""
    if "state" not in row.keys() or row["state"] is None:
        return None
    return SecondStage(
        state=row["state"],
        common=row["transition"] == TRANSITIONS[0],
        choice=row["choice2"],
        response=row["response2"],
        latency_s=row["latency2_s"],
        omitted=bool(row["omitted2"]),
    )
