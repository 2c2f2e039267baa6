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
import uuid
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import date, datetime
from pathlib import Path
from typing import Any

from hdmf.common import DynamicTable
from pynwb import NWBHDF5IO, NWBFile
from pynwb.file import Subject

from server.export.columns import columns_of, flatten, typed
from server.export.nwb_events import add_events
from server.export.nwb_tables import events_table, intervals, json_and_keys, vectors
from server.store import queries, rows
from server.store.dialect import Connection
from server.store.export_reads import export_session_ids, last_stored_t, trial_table

# Vigil's own namespace for file identifiers: the same session always gets the same one.
_ID_SPACE = uuid.uuid5(uuid.NAMESPACE_DNS, "vigil.invalid")

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
    # two-stage trials (empty or NaN in other trials)
    "state": "second-stage state the first choice led to",
    "transition": "'common' or 'rare': how the first choice led there",
    "choice2": "second-stage option chosen, where the state offers a choice",
    "response2": "input that answered in the second stage",
    "latency2_s": "seconds from the second stage's lights on to that response",
    "omitted2": "the second-stage window ran out (1.0/0.0)",
}
BLOCK_NOTES = {
    "block": "block name",
    "block_index": "1-based count of blocks entered",
    "outcomes_withheld": "outcomes withheld in this block (extinction, devaluation test)",
    "contingencies": "reward probability per option in force",
}
FIRING_NOTES = {
    "trial": "the trial after which the rule fired",
    "rule": "rule name in the protocol",
    "actions": "JSON list of what the rule did",
    "reads": "what the rule's condition read",
}


@dataclass(frozen=True, slots=True)
class Exported:
    session_id: int
    path: Path
    trials: int
    events: int


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


def session_file(conn: Connection, session_id: int) -> tuple[NWBFile, tuple[int, int]]:
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
    events = add_events(conn, nwbfile, session_id, wiring)
    _blocks(conn, nwbfile, session_id, end_t)
    _rule_firings(conn, nwbfile, session_id)
    _annotations(conn, nwbfile, session_id, start)
    _estimates(conn, nwbfile, session_id, trials)
    return nwbfile, (len(trials), events)


# ---------------------------------------------------------------- metadata


def _end_t(conn: Connection, session: Mapping[str, Any], start: datetime) -> float:
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


def _trials(conn: Connection, nwbfile: NWBFile, session_id: int) -> list[dict[str, Any]]:
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
    nwbfile.trials = intervals(
        "trials", "every trial of the session, as the store keeps it", start, stop, cols, TRIAL_NOTES
    )
    return records


def _blocks(conn: Connection, nwbfile: NWBFile, session_id: int, end_t: float) -> None:
    found = queries.session_blocks(conn, session_id)
    if not found:
        return
    starts = [b["t_start"] for b in found]
    stops = [max(s, e) for s, e in zip(starts, starts[1:] + [end_t])]
    records = [
        {"block": b["block"], "block_index": b["block_index"], "outcomes_withheld": b["outcomes_withheld"]}
        | json_and_keys("contingencies", b["contingencies"])
        for b in found
    ]
    about = "blocks of the session, each until the next began"
    table = intervals("blocks", about, typed(starts), typed(stops), columns_of(records), BLOCK_NOTES)
    nwbfile.add_time_intervals(table)


def _rule_firings(conn: Connection, nwbfile: NWBFile, session_id: int) -> None:
    found = queries.session_rule_firings(conn, session_id)
    if not found:
        return
    records = [
        {"trial": f["trial"], "rule": f["rule"], "actions": json.dumps(f["actions"], sort_keys=True)}
        | json_and_keys("reads", f["reads"])
        for f in found
    ]
    times, ids = [f["t"] for f in found], [f["id"] for f in found]
    table = events_table("rule_firings", "closed-loop rules that fired", times, ids, columns_of(records), FIRING_NOTES)
    nwbfile.add_events_table(table)


def _annotations(conn: Connection, nwbfile: NWBFile, session_id: int, start: datetime) -> None:
    found = queries.session_annotations(conn, session_id)
    if not found:
        return
    times = [
        a["t"] if a["t"] is not None else (rows.parse_wall_time(a["wall_time"], "note time") - start).total_seconds()
        for a in found
    ]
    records = [{"text": a["text"], "origin": a["origin"], "wall_time": a["wall_time"]} for a in found]
    notes = {"text": "the note", "origin": "who wrote it", "wall_time": "when it was written (ISO 8601)"}
    ids = [a["id"] for a in found]
    nwbfile.add_events_table(
        events_table("annotations", "operators' notes on the session", times, ids, columns_of(records), notes)
    )


def _estimates(conn: Connection, nwbfile: NWBFile, session_id: int, trials: list[dict[str, Any]]) -> None:
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
        columns=vectors(columns_of(records), notes),
        id=list(range(len(records))),
    )
    module = nwbfile.create_processing_module("learning_model", "per-trial estimates of the animal's learning model")
    module.add(table)
