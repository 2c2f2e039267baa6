"""The lab config's optional `subject` keys: lab-wide, per box on top, checked with their place."""

from __future__ import annotations

from pathlib import Path

import pytest

from server.lab.config import load_lab
from server.protocol.problems import InvalidFile

REPO = Path(__file__).resolve().parents[2]
PROTOCOL = REPO / "protocols" / "reversal.yaml"


def write(tmp_path: Path, top: str, box_a: str = "", box_b: str = "") -> Path:
    path = tmp_path / "lab.yaml"
    path.write_text(
        f"""lab: Annex 4
{top}
boxes:
  - name: annex-1
    animal: RN-0601
    protocol: {PROTOCOL}
    emulate: {{agent: random, seed: 1}}
{box_a}
  - name: annex-2
    animal: MS-0602
    protocol: {PROTOCOL}
    emulate: {{agent: random, seed: 2}}
{box_b}
""",
        encoding="utf-8",
    )
    return path


def test_box_keys_go_on_top_of_the_lab_wide_ones(tmp_path):
    lab = load_lab(
        write(
            tmp_path,
            "subject: {species: Rattus norvegicus, strain: Long-Evans}",
            "    subject: {sex: F, age: P11W}",
            "    subject: {species: Mus musculus, strain: C57BL/6J, sex: M, date_of_birth: 2031-02-03}",
        )
    )
    assert [box.subject for box in lab.boxes] == [
        {"species": "Rattus norvegicus", "strain": "Long-Evans", "sex": "F", "age": "P11W"},
        {"species": "Mus musculus", "strain": "C57BL/6J", "sex": "M", "date_of_birth": "2031-02-03"},
    ]


def test_a_lab_without_subject_keys_has_none(tmp_path):
    assert [box.subject for box in load_lab(write(tmp_path, "")).boxes] == [{}, {}]


def test_every_bad_subject_key_is_reported_with_its_place(tmp_path):
    path = write(
        tmp_path,
        "subject: {sex: female, spieces: Rattus norvegicus}",
        "    subject: {age: 11 weeks}",
        "    subject: {date_of_birth: 3rd of May}",
    )
    with pytest.raises(InvalidFile) as caught:
        load_lab(path)
    messages = [str(p) for p in caught.value.problems]
    assert messages == [
        f"{path}:2:16: subject.sex: expected one of F, M, U, O, found 'female'",
        f"{path}:2:24: subject: unknown key 'spieces'; did you mean 'species'?",
        f"{path}:8:20: boxes[1].subject.age: expected an ISO 8601 duration such as P12W or P90D, found '11 weeks'",
        f"{path}:13:30: boxes[2].subject.date_of_birth: expected a date such as 2031-01-15, found '3rd of May'",
    ]
