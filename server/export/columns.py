"""Rows of mixed, nullable values as typed columns, the shape a table in an HDF5 file needs.

Pure: values in, numpy arrays (or lists of text) out. A column keeps the narrowest type
its values allow: bool or int64 when no value is missing, float64 with NaN for a missing
number (or a yes/no that may be missing: 1.0, 0.0, NaN), text with "" for a missing text.
"""

from __future__ import annotations

import json
from collections.abc import Collection, Iterable, Mapping, Sequence
from typing import Any

import numpy as np

Column = np.ndarray | list[str]


def flatten(value: Any, prefix: str) -> dict[str, Any]:
    """A JSON value as leaf columns: nested mappings joined with '.', lists kept as JSON text."""
    if isinstance(value, Mapping):
        out: dict[str, Any] = {}
        for key, inner in value.items():
            out.update(flatten(inner, f"{prefix}.{key}"))
        return out
    if isinstance(value, list | tuple):
        return {prefix: json.dumps(value, sort_keys=True)}
    return {prefix: value}


def union_keys(rows: Iterable[Mapping[str, Any]]) -> list[str]:
    """Every key of the rows, in order of first appearance."""
    seen: dict[str, None] = {}
    for row in rows:
        seen.update(dict.fromkeys(row))
    return list(seen)


def typed(values: Sequence[Any], *, text: bool = False) -> Column:
    """One column of values (None for missing) in its narrowest type; `text` makes it text
    whatever the values (a text column of the database that holds no value yet)."""
    present = [v for v in values if v is not None]
    if text:
        return ["" if v is None else v if isinstance(v, str) else json.dumps(v, sort_keys=True) for v in values]
    if not present:
        return np.full(len(values), np.nan)
    if all(isinstance(v, bool | np.bool_) for v in present):
        if len(present) == len(values):
            return np.array(values, dtype=bool)
        return np.array([np.nan if v is None else float(v) for v in values])
    if all(isinstance(v, int | float | np.integer | np.floating) and not isinstance(v, bool) for v in present):
        if len(present) == len(values) and all(isinstance(v, int | np.integer) for v in present):
            return np.array(values, dtype=np.int64)
        return np.array([np.nan if v is None else float(v) for v in values], dtype=np.float64)
    return ["" if v is None else v if isinstance(v, str) else json.dumps(v, sort_keys=True) for v in values]


def columns_of(
    rows: Sequence[Mapping[str, Any]], *, text: Collection[str] = (), absent: Mapping[str, Any] | None = None
) -> dict[str, Column]:
    """The rows as typed columns, one per key; `text` names columns kept as text, `absent`
    the value a key's absence stands for by its prefix (e.g. 0 for a count; else missing)."""
    absent = absent or {}
    out: dict[str, Column] = {}
    for key in union_keys(rows):
        default = absent.get(key.split(".", 1)[0]) if "." in key else None
        out[key] = typed([row.get(key, default) for row in rows], text=key in text)
    return out
