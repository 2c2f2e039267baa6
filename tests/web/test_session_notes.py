"""A rule's `note` action shows among the session's notes, beside the operators' notes."""

from __future__ import annotations

import sqlite3

from web_samples import AUTOSHAPING, TestClient, record_session

from server.store.writer import Store
from server.web import create_app


def test_rule_notes_are_listed_with_operator_notes(tmp_path):
    path = tmp_path / "lab.sqlite"
    with Store.open(path) as store:
        sid = record_session(
            store, box="rack-7", animal="RN-0577", protocol_path=AUTOSHAPING, agent="pavlovian", seed=3, minutes=60
        )
        store.write_annotation(sid, "bedding changed before the session", "tech-2", t=12.5)
    with sqlite3.connect(path) as conn:
        written = conn.execute(
            "SELECT name FROM events WHERE session_id = ? AND kind = 'note' AND detail LIKE '%\"text\"%'", (sid,)
        ).fetchall()
    assert written, "the autoshaping rules wrote no note"
    with TestClient(create_app(path)) as client:
        html = client.get(f"/sessions/{sid}").text
    notes = html.split("<h2>Notes</h2>")[1].split("</section>")[0]
    assert "bedding changed before the session" in notes and "tech-2" in notes
    for (name,) in written:
        assert f"rule {name}" in notes
    assert "classified" in notes
    # in session-time order: the operator's note (12.5 s) before the rules' (after the last trial)
    assert notes.index("bedding changed") < notes.index("classified")
