"""The session's events in the NWB file: one events table per stored kind, and each sync
output's pulses as a series of their own (what a lab aligns a neural recording with)."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
from pynwb import NWBFile, TimeSeries

from server.export.columns import columns_of
from server.export.nwb_tables import events_table, hdf5_name
from server.store.dialect import Connection
from server.store.export_reads import event_table

NO_DEVICE_TIME = -1  # device_t_us / device_seq of an event the host originated

EVENT_NOTES = {
    "input": "input edges from the box: value 1 onset (press, entry), 0 offset",
    "output": "held outputs driven by the host: value 1 active, 0 inactive",
    "pulse": "pulses commanded on pulsed outputs (feeder, sync): value is the width in ms",
    "applied": (
        "output commands as the device acknowledged them, written right after it applied them: device_t_us is "
        "when the output changed on the device's clock; value 1/0 for held outputs, the width in ms for pulses"
    ),
    "step": "protocol steps entered",
    "block": "blocks entered",
    "note": "notes of the session and of its link (session start, undelivered commands, closing)",
    "cap": "hard caps reached",
    "alarm": "alarms raised by rules or the link",
    "link_lost": "the box link was lost",
    "link_restored": "the box link came back",
}


# What the event's `name` column is called in each kind's table ('name' itself is taken).
_SUBJECT_OF = {"input": "input", "output": "output", "pulse": "output", "step": "step", "block": "block"}


def add_events(conn: Connection, nwbfile: NWBFile, session_id: int, wiring: Mapping[str, Any]) -> int:
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
            events_table(
                hdf5_name(f"{kind}_events"),
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
                name=hdf5_name(f"sync_pulses_{output}"),
                description=(
                    f"pulses commanded on sync output '{output}': timestamps are the host's session seconds "
                    "when the pulse was sent, data the pulse width the device generated"
                ),
                data=np.array([p[at["value"]] / 1000.0 for p in mine], dtype=np.float64),
                unit="s",
                timestamps=np.array([p[at["t"]] for p in mine], dtype=np.float64),
                comments=(
                    f"{len(mine)} pulse(s); the same in /events/pulse_events, and, from a serial box, "
                    "each as the device applied it, with the device's clock, in /events/applied_events"
                ),
            )
        )
