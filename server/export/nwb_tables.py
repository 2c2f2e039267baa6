"""Table building blocks for the NWB export: names HDF5 accepts, columns with descriptions,
interval and event tables built column by column (add_row per row is slow for long sessions)."""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from hdmf.common import VectorData
from pynwb.epoch import TimeIntervals
from pynwb.event import DurationVectorData, EventsTable, TimestampVectorData

from server.export.columns import Column, flatten


def hdf5_name(text: str) -> str:
    """A name HDF5 groups and datasets accept ('/' separates groups)."""
    return text.replace("/", "_") or "_"


def vectors(cols: Mapping[str, Column], notes: Mapping[str, str]) -> list[VectorData]:
    return [VectorData(name=hdf5_name(k), description=note(k, notes), data=v) for k, v in cols.items()]


def note(key: str, notes: Mapping[str, str]) -> str:
    if key in notes:
        return notes[key]
    head = key.split(".", 1)[0]
    return f"{notes[head]} (key {key[len(head) + 1 :]})" if head in notes else f"'{key}' as the store keeps it"


def intervals(
    name: str, description: str, start: Column, stop: Column, cols: Mapping[str, Column], notes: Mapping[str, str]
) -> TimeIntervals:
    """A TimeIntervals table built column by column (add_row per row is slow for long sessions)."""
    bounds = [
        VectorData(name="start_time", description="start, seconds from session start", data=start),
        VectorData(name="stop_time", description="end, seconds from session start", data=stop),
    ]
    return TimeIntervals(
        name=name, description=description, columns=bounds + vectors(cols, notes), id=list(range(len(start)))
    )


def events_table(
    name: str, description: str, t: Sequence[float], ids: Sequence[int], cols: Mapping[str, Column],
    notes: Mapping[str, str], duration: Column | None = None,
) -> EventsTable:  # fmt: skip
    columns: list[VectorData] = [
        TimestampVectorData(name="timestamp", description="seconds from session start (host clock)", data=np.asarray(t))
    ]
    if duration is not None:
        columns.append(DurationVectorData(name="duration", description="pulse width, seconds", data=duration))
    return EventsTable(name=name, description=description, columns=columns + vectors(cols, notes), id=list(ids))


def json_and_keys(name: str, value: Any) -> dict[str, Any]:
    """A JSON value as its text under `name`, and a mapping's keys as `name.key` beside it."""
    return {name: json.dumps(value, sort_keys=True)} | (flatten(value, name) if isinstance(value, dict) else {})
