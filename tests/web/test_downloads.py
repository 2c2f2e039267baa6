"""Downloads from the status page: a choices CSV `vigil fit` reads as it is, and a trials CSV
with one value per cell."""

from __future__ import annotations

import csv
import io
import json
import re
import sqlite3

from server.cli import main
from server.cli.fit_sources import HEADER


def _fit_json(argv: list[str], capsys) -> list[dict]:
    assert main(["fit", *argv, "--model", "q_learning", "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_an_animals_choices_round_trip_through_vigil_fit(read_only, lab_db, tmp_path, capsys):
    response = read_only.get("/api/animals/RN-0501/choices.csv")
    assert response.status_code == 200 and response.headers["content-type"].startswith("text/csv")
    assert 'filename="animal-RN-0501-choices.csv"' in response.headers["content-disposition"]
    assert response.text.splitlines()[0] == ",".join(HEADER)
    path = tmp_path / "choices.csv"
    path.write_text(response.text, encoding="utf-8")
    # The downloaded file fits to exactly what `vigil fit --db` fits from the database itself.
    from_csv = _fit_json([str(path)], capsys)
    from_db = _fit_json(["--db", str(lab_db["path"]), "--animal", "RN-0501"], capsys)
    assert from_csv == from_db
    assert from_csv[0]["animal"] == "RN-0501"


def test_a_sessions_choices_are_that_sessions_trials(read_only, lab_db, tmp_path, capsys):
    sid = lab_db["second"]
    response = read_only.get(f"/api/sessions/{sid}/choices.csv")
    assert f'filename="session-{sid}-choices.csv"' in response.headers["content-disposition"]
    found = list(csv.DictReader(io.StringIO(response.text)))
    conn = sqlite3.connect(lab_db["path"])
    stored = conn.execute(
        "SELECT trial, choice, omission, reward FROM trials WHERE session_id = ? ORDER BY trial", (sid,)
    )
    # An omission, or a trial cut short before a choice, has an empty choice.
    expected = [
        {"animal": "RN-0501", "session": str(sid), "trial": str(n), "choice": "" if omitted else choice or "",
         "reward": str(reward)}
        for n, choice, omitted, reward in stored
    ]  # fmt: skip
    assert found == expected
    path = tmp_path / "one.csv"
    path.write_text(response.text, encoding="utf-8")
    assert _fit_json([str(path)], capsys)[0]["n_trials"] == sum(1 for row in expected if row["choice"])


def test_downloads_are_linked_from_the_pages(read_only, lab_db):
    sid = lab_db["second"]
    assert f'href="/api/sessions/{sid}/choices.csv"' in read_only.get(f"/sessions/{sid}").text
    assert 'href="/api/animals/RN-0501/choices.csv"' in read_only.get("/animals/RN-0501").text
    assert read_only.get("/api/animals/RN-9999/choices.csv").status_code == 404


def test_trials_csv_has_one_value_per_cell_and_times_to_the_millisecond(read_only, lab_db):
    sid = lab_db["second"]
    found = list(csv.DictReader(io.StringIO(read_only.get(f"/api/sessions/{sid}/trials.csv").text)))
    conn = sqlite3.connect(lab_db["path"])
    stored = conn.execute("SELECT t_end, counts FROM trials WHERE session_id = ? ORDER BY trial", (sid,)).fetchall()
    assert len(found) == len(stored)
    for row, (t_end, counts) in zip(found, stored):
        assert row["t_end"] == f"{t_end:.3f}"
        per_input: dict[str, int] = {}
        for key, count in json.loads(counts).items():
            assert int(row[f"counts.{key}"]) == count
            per_input[key.split(".")[-1]] = per_input.get(key.split(".")[-1], 0) + count
        assert {k: int(row[f"responses.{k}"]) for k in per_input} == per_input
        assert sum(int(v) for k, v in row.items() if k.startswith("responses.")) == sum(per_input.values())
        assert not any(v.startswith(("{", "[")) for v in row.values())
        times = [v for k, v in row.items() if k.startswith(("t_", "first_s.", "steps.")) or k.endswith("_s")]
        assert all(re.fullmatch(r"-?\d+\.\d{3}", v) for v in times if v)
