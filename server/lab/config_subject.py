"""The lab config's `subject` keys: what a lab says about its animals beyond their ids.

All optional, lab-wide at the top level and per box (a box's keys win), stored with each
session so an export names the species, sex and age without the config at hand.
"""

from __future__ import annotations

import datetime as dt
import re
from collections.abc import Mapping
from typing import Any

from server.protocol.marked import Marked
from server.protocol.reader import Reader, describe

SUBJECT_KEYS = ("species", "strain", "sex", "age", "date_of_birth", "genotype", "description")
SEXES = ("F", "M", "U", "O")  # the NWB standard's recommended codes: female, male, unknown, other
# ISO 8601 durations as an age: P12W, P90D, P1Y2M, P2W3D (no time part for an animal's age).
_AGE = re.compile(r"^P(?=\d)(\d+Y)?(\d+M)?(\d+W)?(\d+D)?$")


def read_subject(r: Reader, node: Marked | None, where: str) -> dict[str, str]:
    """The subject keys present, as text (date_of_birth as YYYY-MM-DD); {} when absent."""
    f = r.mapping(node, where, SUBJECT_KEYS)
    if not f:
        return {}
    out: dict[str, str] = {}
    for key in ("species", "strain", "genotype", "description"):
        if key in f:
            value = r.text(f[key], f"{where}.{key}")
            if value is not None:
                out[key] = value.strip()
    if "sex" in f:
        sex = r.choice(f["sex"], f"{where}.sex", SEXES)
        if sex is not None:
            out["sex"] = sex
    if "age" in f:
        age = f["age"].value
        if isinstance(age, str) and _AGE.match(age.strip()):
            out["age"] = age.strip()
        else:
            r.error(
                f["age"].mark,
                f"{where}.age: expected an ISO 8601 duration such as P12W or P90D, found {describe(age)}",
            )
    if "date_of_birth" in f:
        born = f["date_of_birth"].value
        if isinstance(born, str):
            try:
                born = dt.date.fromisoformat(born.strip())
            except ValueError:
                pass
        if isinstance(born, dt.date) and not isinstance(born, dt.datetime):
            out["date_of_birth"] = born.isoformat()
        else:
            r.error(
                f["date_of_birth"].mark,
                f"{where}.date_of_birth: expected a date such as 2031-01-15, found {describe(born)}",
            )
    return out


def merged_subject(lab_wide: Mapping[str, Any], own: Mapping[str, Any]) -> dict[str, str]:
    """A box's subject: the lab-wide keys with the box's own on top."""
    return {**lab_wide, **own}
