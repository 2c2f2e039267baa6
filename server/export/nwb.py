"""A stored session as one NWB file (Neurodata Without Borders, written with pynwb).

Where things go (README "Exporting to NWB" says the same for users):

- /general: subject (animal id; species, sex, age ... from the lab config), session start
  time with its zone, `protocol` the protocol file's text (when the file still has the
  stored SHA-256), `notes` a JSON document: box, protocol path and SHA-256, end reason,
  seed, trial and reward counts, settings.
- /intervals/trials: one row per trial, every column of the trials table (JSON columns
  as their text plus one column per key); /intervals/blocks: each block, start to next.
- /events: one table per stored event kind (input_events, output_events, pulse_events ...)
  with session time, device time and sequence number; rule_firings; annotations.
- /acquisition/sync_pulses_<output>: each sync output's pulses as their own series.
- /processing/learning_model/estimates: the online estimator after each trial.

All times are seconds from the session start (NWB's timestamps reference time).
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import sqlite3
import uuid
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import date, datetime
from pathlib import Path
from typing import Any

import numpy as np
from hdmf.common import DynamicTable, VectorData
from pynwb import NWBHDF5IO, NWBFile, TimeSeries
from pynwb.epoch import TimeIntervals
from pynwb.event import DurationVectorData, EventsTable, TimestampVectorData
from pynwb.file import Subject

from server.export.columns import Column, columns_of, flatten, typed
from server.store import queries, rows
from server.store.export_reads import event_table, export_session_ids, last_stored_t, trial_table

# Vigil's own namespace for file identifiers: the same session always gets the same one.
_ID_SPACE = uuid.uuid5(uuid.NAMESPACE_DNS, "vigil.invalid")
NO_DEVICE_TIME = -1  # device_t_us / device_seq of an event the host originated

TRIAL_NOTES = {
    "trial": "trial number, 1-based within the session",
    "block": "block the trial ran in",
    "block_index": "1-based count of blocks entered so far",
    "trial_type": "the protocol's trial type",
    "choice": "option chosen; empty when none was",
    "response": "input that ended the response window; empty when none did",
    "latency_s": "seconds from the response window opening to the response; NaN when none",
    "rewarded": "a reward was delivered",
    "reward": "pellets delivered in the trial",
    "correct": "chose a best option under the contingencies in force (1.0/0.0; NaN when not scored)",
    "omission": "no response in the response window",
    "interrupted": "the trial was cut short (session end, link loss)",
    "iti_s": "intertrial interval that followed, seconds",
    "steps": "JSON list of [step, entry time in session seconds]",
    "counts": "JSON: responses per step.input in the trial (0 where none)",
    "first_s": "JSON: seconds to the first response per step.input",
    "extra": "JSON: protocol-specific values",
}
EVENT_NOTES = {
    "input": "input edges from the box: value 1 onset (press, entry), 0 offset",
    "output": "held outputs driven by the host: value 1 active, 0 inactive",
    "pulse": "pulses commanded on pulsed outputs (feeder, sync): value is the width in ms",
    "step": "protocol steps entered",
    "block": "blocks entered",
    "note": "notes of the session and of its link (session start, undelivered commands, closing)",
    "cap": "hard caps reached",
    "alarm": "alarms raised by rules or the link",
    "link_lost": "the box link was lost",
    "link_restored": "the box link came back",
}


@dataclass(frozen=True, slots=True)
class Exported:
    session_id: int
    path: Path
    trials: int
    events: int


def _name(text: str) -> str:
    """A name HDF5 groups and datasets accept ('/' separates groups)."""
    return text.replace("/", "_") or "_"


def file_name(animal: str, session_id: int) -> str:
    return f"sub-{re.sub(r'[^A-Za-z0-9-]+', '-', animal).strip('-') or 'animal'}_ses-{session_id}.nwb"


def export_nwb(
    db_path: str | Path, out_dir: str | Path, *, session_id: int | None = None, animal: str | None = None
) -> list[Exported]:
    """Write one NWB file per session (one session, an animal's, or all) into `out_dir`.

    Raises StoreError for a database that cannot be read or a session or animal it lacks,
    OSError when the folder cannot be written."""
    out = Path(out_dir)
    conn = queries.open_readonly(db_path)
    try:
        ids = export_session_ids(conn, session_id=session_id, animal=animal)
        out.mkdir(parents=True, exist_ok=True)
        done = []
        for sid in ids:
            nwbfile, counts = session_file(conn, sid)
            path = out / file_name(nwbfile.subject.subject_id, sid)
            write(nwbfile, path)
            done.append(Exported(sid, path, *counts))
        return done
    finally:
        conn.close()


def write(nwbfile: NWBFile, path: Path) -> None:
    """Write beside the target, then rename: a reader never sees half a file."""
    part = path.with_name(f".{path.stem}.part.nwb")  # hidden while written
    try:
        with NWBHDF5IO(str(part), "w") as io:
            io.write(nwbfile)
        os.replace(part, path)
    finally:
        part.unlink(missing_ok=True)


def session_file(conn: sqlite3.Connection, session_id: int) -> tuple[NWBFile, tuple[int, int]]:
    """The session as an NWBFile in memory, with its (trial, event) counts."""
    session = queries.get_session(conn, session_id)
    assert session is not None
    settings = session.get("settings") or {}
    start = rows.parse_wall_time(session["started_at"], f"started_at of session {session_id}")
    end_t = _end_t(conn, session, start)
    protocol_text, protocol_state = _protocol_text(session)
    notes = {
        "vigil_session": session_id,
        "box": session["box"],
        "protocol": session["protocol"],
        "protocol_path": session["protocol_path"],
        "protocol_sha256": session["protocol_sha256"],
        "protocol_text": protocol_state,
        "started_at": session["started_at"],
        "ended_at": session["ended_at"],
        "end_reason": session["end_reason"],
        "seed": session["seed"],
        "trials": session["trials"],
        "rewards": session["rewards"],
        "settings": settings,
    }
    nwbfile = NWBFile(
        session_description=(
            f"{session['protocol']} on box {session['box']}, animal {session['animal']}; "
            f"ended: {session['end_reason'] or 'not ended (still running when exported)'}"
        ),
        identifier=str(uuid.uuid5(_ID_SPACE, f"{session['started_at']}|{session['box']}|{session_id}")),
        session_start_time=start,
        session_id=str(session_id),
        experiment_description=f"vigil protocol '{session['protocol']}'",
        protocol=protocol_text,
        notes=json.dumps(notes, sort_keys=True),
        source_script="vigil export --nwb",
        source_script_file_name="vigil",
        subject=_subject(session["animal"], settings.get("subject") or {}, start),
    )
    trials = _trials(conn, nwbfile, session_id)
    wiring = settings.get("wiring") or {}
    events = _events(conn, nwbfile, session_id, wiring)
    _blocks(conn, nwbfile, session_id, end_t)
    _rule_firings(conn, nwbfile, session_id)
    _annotations(conn, nwbfile, session_id, start)
    _estimates(conn, nwbfile, session_id, trials)
    return nwbfile, (len(trials), events)


# ---------------------------------------------------------------- metadata


def _end_t(conn: sqlite3.Connection, session: Mapping[str, Any], start: datetime) -> float:
    last = last_stored_t(conn, session["id"])
    if session["ended_at"]:
        ended = rows.parse_wall_time(session["ended_at"], "ended_at")
        return max(last, (ended - start).total_seconds())
    return last


def _protocol_text(session: Mapping[str, Any]) -> tuple[str | None, str]:
    """The protocol file's text when it is still the file the session ran, and what became of it."""
    path, stored = session["protocol_path"], session["protocol_sha256"]
    if not path:
        return None, "no protocol path stored"
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        return None, f"file not readable at export: {exc.strerror or exc}"
    digest = hashlib.sha256(data).hexdigest()
    if stored and digest != stored:
        return None, f"file changed since the session (its SHA-256 is now {digest})"
    try:
        return data.decode("utf-8"), "included in /general/protocol"
    except UnicodeDecodeError:
        return None, "file is not UTF-8 text"


def _subject(animal: str, given: Mapping[str, Any], start: datetime) -> Subject:
    keys = {k: given[k] for k in ("species", "strain", "sex", "age", "genotype", "description") if given.get(k)}
    born = given.get("date_of_birth")
    if born:
        keys["date_of_birth"] = datetime.combine(date.fromisoformat(born), datetime.min.time(), start.tzinfo)
    return Subject(subject_id=animal, **keys)


# ---------------------------------------------------------------- tables


def _vectors(cols: Mapping[str, Column], notes: Mapping[str, str]) -> list[VectorData]:
    return [VectorData(name=_name(k), description=_note(k, notes), data=v) for k, v in cols.items()]


def _note(key: str, notes: Mapping[str, str]) -> str:
    if key in notes:
        return notes[key]
    head = key.split(".", 1)[0]
    return f"{notes[head]} (key {key[len(head) + 1 :]})" if head in notes else f"'{key}' as the store keeps it"


def _trials(conn: sqlite3.Connection, nwbfile: NWBFile, session_id: int) -> list[dict[str, Any]]:
    """The trials table: every stored column, JSON columns also spread into one per key."""
    columns, found = trial_table(conn, session_id)
    names = [name for name, _ in columns]
    records = []
    for raw in found:
        record: dict[str, Any] = {}
        for name, value in zip(names, raw):
            if name in rows.JSON_COLUMNS:
                record[name] = value  # the stored JSON text, exactly
                decoded = rows.from_json(value)
                if isinstance(decoded, dict):
                    record.update(flatten(decoded, name))
            elif name in rows.BOOL_COLUMNS and value is not None:
                record[name] = bool(value)
            else:
                record[name] = value
        records.append(record)
    if not records:
        return records
    text = [name for name, declared in columns if "CHAR" in declared or "TEXT" in declared or "CLOB" in declared]
    cols = columns_of(records, text=text, absent={"counts": 0})  # a count not stored is no response there
    start, stop = cols.pop("t_start"), cols.pop("t_end")
    nwbfile.trials = _intervals(
        "trials", "every trial of the session, as the store keeps it", start, stop, cols, TRIAL_NOTES
    )
    return records


def _intervals(
    name: str, description: str, start: Column, stop: Column, cols: Mapping[str, Column], notes: Mapping[str, str]
) -> TimeIntervals:
    """A TimeIntervals table built column by column (add_row per row is slow for long sessions)."""
    bounds = [
        VectorData(name="start_time", description="start, seconds from session start", data=start),
        VectorData(name="stop_time", description="end, seconds from session start", data=stop),
    ]
    return TimeIntervals(
        name=name, description=description, columns=bounds + _vectors(cols, notes), id=list(range(len(start)))
    )


def _events_table(
    name: str, description: str, t: Sequence[float], ids: Sequence[int], cols: Mapping[str, Column],
    notes: Mapping[str, str], duration: Column | None = None,
) -> EventsTable:  # fmt: skip
    columns: list[VectorData] = [
        TimestampVectorData(name="timestamp", description="seconds from session start (host clock)", data=np.asarray(t))
    ]
    if duration is not None:
        columns.append(DurationVectorData(name="duration", description="pulse width, seconds", data=duration))
    return EventsTable(name=name, description=description, columns=columns + _vectors(cols, notes), id=list(ids))


# What the event's `name` column is called in each kind's table ('name' itself is taken).
_SUBJECT_OF = {"input": "input", "output": "output", "pulse": "output", "step": "step", "block": "block"}


def _events(conn: sqlite3.Connection, nwbfile: NWBFile, session_id: int, wiring: Mapping[str, Any]) -> int:
    """One events table per stored kind, every event in it; each sync output's pulses as a series."""
    columns, found = event_table(conn, session_id)
    at = {name: i for i, (name, _) in enumerate(columns)}
    line_kinds = {**(wiring.get("inputs") or {}), **(wiring.get("outputs") or {})}
    by_kind: dict[str, list[tuple[Any, ...]]] = {}
    for row in found:
        by_kind.setdefault(row[at["kind"]], []).append(row)
    for kind, group in by_kind.items():
        about = _SUBJECT_OF.get(kind, "about")
        records = []
        for row in group:
            record: dict[str, Any] = {about: row[at["name"]]}
            if kind in ("input", "output", "pulse"):
                record["line_kind"] = line_kinds.get(row[at["name"]], "")
            for name, i in at.items():
                if name in ("id", "kind", "name", "t"):
                    continue
                value = row[i]
                if name in ("device_t_us", "device_seq"):
                    value = NO_DEVICE_TIME if value is None else value
                record[name] = value
            records.append(record)
        text = [name for name, declared in columns if "TEXT" in declared] + [about, "line_kind"]
        cols = columns_of(records, text=text)
        notes = {
            about: f"the {about} the event concerns",
            "line_kind": "kind of hardware line, from the protocol's wiring",
            "value": "the event's value (see the table's description)",
            "device_t_us": f"device clock, microseconds (wraps at 2**32); {NO_DEVICE_TIME}: the host made the event",
            "device_seq": f"device sequence number; {NO_DEVICE_TIME} when the host made the event",
            "detail": "JSON detail; empty when none",
        }
        widths = None
        if kind == "pulse":
            widths = np.array([np.nan if r[at["value"]] is None else r[at["value"]] / 1000.0 for r in group])
        nwbfile.add_events_table(
            _events_table(
                _name(f"{kind}_events"),
                EVENT_NOTES.get(kind, f"'{kind}' events"),
                [r[at["t"]] for r in group],
                [r[at["id"]] for r in group],
                cols,
                notes,
                widths,
            )  # fmt: skip
        )
    _sync_series(nwbfile, by_kind.get("pulse", []), at, line_kinds)
    return len(found)


def _sync_series(nwbfile: NWBFile, pulses: list[tuple[Any, ...]], at: Mapping[str, int], kinds: Mapping[str, str]):
    """Pulses of sync outputs, what a lab aligns a neural recording with, one series per output."""
    for output in sorted(n for n, k in kinds.items() if k == "sync"):
        mine = [p for p in pulses if p[at["name"]] == output and p[at["value"]] is not None]
        nwbfile.add_acquisition(
            TimeSeries(
                name=_name(f"sync_pulses_{output}"),
                description=(
                    f"pulses commanded on sync output '{output}': timestamps are the host's session seconds "
                    "when the pulse was sent, data the pulse width the device generated"
                ),
                data=np.array([p[at["value"]] / 1000.0 for p in mine], dtype=np.float64),
                unit="s",
                timestamps=np.array([p[at["t"]] for p in mine], dtype=np.float64),
                comments=f"{len(mine)} pulse(s); the same events are in /events/pulse_events",
            )
        )


def _blocks(conn: sqlite3.Connection, nwbfile: NWBFile, session_id: int, end_t: float) -> None:
    found = queries.session_blocks(conn, session_id)
    if not found:
        return
    starts = [b["t_start"] for b in found]
    stops = [max(s, e) for s, e in zip(starts, starts[1:] + [end_t])]
    records = []
    for b in found:
        record = {"block": b["block"], "block_index": b["block_index"], "outcomes_withheld": b["outcomes_withheld"]}
        record["contingencies"] = json.dumps(b["contingencies"], sort_keys=True)
        record.update(flatten(b["contingencies"] or {}, "contingencies"))
        records.append(record)
    notes = {
        "block": "block name",
        "block_index": "1-based count of blocks entered",
        "outcomes_withheld": "outcomes withheld in this block (extinction, devaluation test)",
        "contingencies": "reward probability per option in force",
    }
    nwbfile.add_time_intervals(
        _intervals(
            "blocks",
            "blocks of the session, each until the next began",
            typed(starts),
            typed(stops),
            columns_of(records),
            notes,
        )  # fmt: skip
    )


def _rule_firings(conn: sqlite3.Connection, nwbfile: NWBFile, session_id: int) -> None:
    found = queries.session_rule_firings(conn, session_id)
    if not found:
        return
    records = []
    for f in found:
        record = {"trial": f["trial"], "rule": f["rule"], "actions": json.dumps(f["actions"], sort_keys=True)}
        record["reads"] = json.dumps(f["reads"], sort_keys=True)
        record.update(flatten(f["reads"] or {}, "reads"))
        records.append(record)
    notes = {
        "trial": "the trial after which the rule fired",
        "rule": "rule name in the protocol",
        "actions": "JSON list of what the rule did",
        "reads": "what the rule's condition read",
    }
    nwbfile.add_events_table(
        _events_table(
            "rule_firings",
            "closed-loop rules that fired",
            [f["t"] for f in found],
            [f["id"] for f in found],
            columns_of(records),
            notes,
        )  # fmt: skip
    )


def _annotations(conn: sqlite3.Connection, nwbfile: NWBFile, session_id: int, start: datetime) -> None:
    found = queries.session_annotations(conn, session_id)
    if not found:
        return
    times = [
        a["t"] if a["t"] is not None else (rows.parse_wall_time(a["wall_time"], "note time") - start).total_seconds()
        for a in found
    ]
    records = [{"text": a["text"], "origin": a["origin"], "wall_time": a["wall_time"]} for a in found]
    notes = {"text": "the note", "origin": "who wrote it", "wall_time": "when it was written (ISO 8601)"}
    nwbfile.add_events_table(
        _events_table(
            "annotations",
            "operators' notes on the session",
            times,
            [a["id"] for a in found],
            columns_of(records),
            notes,
        )  # fmt: skip
    )


def _estimates(conn: sqlite3.Connection, nwbfile: NWBFile, session_id: int, trials: list[dict[str, Any]]) -> None:
    found = queries.session_estimates(conn, session_id)
    if not found:
        return
    ends = {t["trial"]: t["t_end"] for t in trials}
    records = []
    for e in found:
        record: dict[str, Any] = {"trial": e["trial"], "t": ends.get(e["trial"]), "model": e["model"]}
        for key, value in (e["data"] or {}).items():
            if key != "model":
                record.update(flatten(value, key))
        records.append(record)
    notes = {
        "trial": "the estimate after this trial",
        "t": "that trial's end, seconds from session start",
        "model": "the learning model estimated",
        "params": "posterior of each parameter: mean, and low/high the 2.5 % and 97.5 % quantiles (a 95 % interval)",
        "values": "learned value of each option",
        "p_choice": "predicted probability of choosing each option next",
    }
    table = DynamicTable(
        name="estimates",
        description="the online estimator's estimate after each trial; NaN where a value was undefined",
        columns=_vectors(columns_of(records), notes),
        id=list(range(len(records))),
    )
    module = nwbfile.create_processing_module("learning_model", "per-trial estimates of the animal's learning model")
    module.add(table)
