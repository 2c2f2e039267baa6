"""The JSON API and pages over a stored lab, in process, against the store's own contents."""

from __future__ import annotations

import csv
import io
import sqlite3

from web_samples import EVIL_BOX


def _db(lab_db) -> sqlite3.Connection:
    conn = sqlite3.connect(lab_db["path"])
    conn.row_factory = sqlite3.Row
    return conn


def test_boxes_lists_the_latest_session_of_every_box(read_only, lab_db):
    tiles = read_only.get("/api/boxes").json()
    by_box = {t["box"]: t for t in tiles}
    assert set(by_box) == {"rack-1", "rack-2", EVIL_BOX}
    assert by_box["rack-1"]["session_id"] == lab_db["second"]  # not the older first session
    conn = _db(lab_db)
    for tile in tiles:
        row = conn.execute("SELECT * FROM sessions WHERE id = ?", (tile["session_id"],)).fetchone()
        assert (tile["animal"], tile["trials_done"], tile["rewards"]) == (row["animal"], row["trials"], row["rewards"])
        assert tile["state"] == "ended" and tile["live"] is False
        assert tile["end_reason"] == row["end_reason"] == "session time limit"
        assert tile["alarms"] == []
    # accuracy = fraction correct over scored trials, recomputed here from the trials table
    scored = conn.execute(
        "SELECT correct FROM trials WHERE session_id = ? AND correct IS NOT NULL", (lab_db["second"],)
    ).fetchall()
    assert by_box["rack-1"]["accuracy"] == sum(r[0] for r in scored) / len(scored)
    assert by_box["rack-2"]["accuracy"] is None  # autoshaping has no correct choice
    t, rule = conn.execute(
        "SELECT t, rule FROM rule_firings WHERE session_id = ? ORDER BY t DESC LIMIT 1", (lab_db["second"],)
    ).fetchone()
    assert by_box["rack-1"]["last_rule"]["t"] == t
    text = by_box["rack-1"]["last_rule"]["text"]  # in words, with the condition from the protocol that ran
    assert text.startswith("reversed west/east because ") and text.endswith(f"(rule {rule})")
    assert ("≥ 0.95 for 5 trials" in text) if rule == "learned" else ("streak 8 ≥ 8" in text)
    assert by_box["rack-2"]["last_rule"] is None


def test_session_trials_estimates_and_events(read_only, lab_db):
    sid = lab_db["second"]
    conn = _db(lab_db)
    detail = read_only.get(f"/api/sessions/{sid}").json()
    assert detail["session"]["id"] == sid and detail["session"]["box"] == "rack-1"
    stored_blocks = [
        r[0] for r in conn.execute("SELECT block FROM blocks WHERE session_id = ? ORDER BY block_index", (sid,))
    ]
    assert [b["block"] for b in detail["blocks"]] == stored_blocks
    assert detail["status"]["block"] == stored_blocks[-1]
    trials = read_only.get(f"/api/sessions/{sid}/trials").json()
    assert [t["trial"] for t in trials] == list(range(1, detail["session"]["trials"] + 1))
    assert read_only.get(f"/api/sessions/{sid}/trials?after=5").json()[0]["trial"] == 6
    estimates = read_only.get(f"/api/sessions/{sid}/estimates").json()
    stored = [r[0] for r in conn.execute("SELECT trial FROM estimates WHERE session_id = ? ORDER BY trial", (sid,))]
    assert [e["trial"] for e in estimates] == stored and len(stored) >= len(trials) - 1
    assert set(estimates[-1]["data"]["params"]) == {"alpha", "beta"}
    firings = conn.execute("SELECT t, rule FROM rule_firings WHERE session_id = ? ORDER BY t", (sid,)).fetchall()
    assert firings, "the reversal protocol's rules fire within a 12-minute session"
    assert [(f["t"], f["rule"]) for f in detail["rule_firings"]] == [tuple(f) for f in firings]
    tail = read_only.get(f"/api/sessions/{sid}/events?tail=5").json()
    last_ids = [
        r[0] for r in conn.execute("SELECT id FROM events WHERE session_id = ? ORDER BY id DESC LIMIT 5", (sid,))
    ]
    assert [e["id"] for e in tail] == sorted(last_ids)
    assert read_only.get(f"/api/sessions/{lab_db['pav']}/estimates").json() == []


def test_csv_downloads_hold_every_row(read_only, lab_db):
    sid = lab_db["pav"]
    conn = _db(lab_db)
    for what, table in (("trials", "trials"), ("events", "events")):
        response = read_only.get(f"/api/sessions/{sid}/{what}.csv")
        assert response.status_code == 200
        assert response.headers["content-type"].startswith("text/csv")
        assert f"session-{sid}-{what}.csv" in response.headers["content-disposition"]
        rows = list(csv.DictReader(io.StringIO(response.text)))
        count = conn.execute(f"SELECT count(*) FROM {table} WHERE session_id = ?", (sid,)).fetchone()[0]
        assert len(rows) == count > 0


def test_animal_history_across_sessions(read_only, lab_db):
    body = read_only.get("/api/animals/RN-0501").json()
    assert [s["id"] for s in body["sessions"]] == [lab_db["first"], lab_db["middle"], lab_db["second"]]
    conn = _db(lab_db)
    for session in body["sessions"]:
        last_block = conn.execute(
            "SELECT block FROM blocks WHERE session_id = ? ORDER BY block_index DESC LIMIT 1", (session["id"],)
        ).fetchone()[0]
        assert session["last_block"] == last_block
        assert set(session["fitted"]["params"]) == {"alpha", "beta"}
        low, mean, high = (session["fitted"]["params"]["alpha"][k] for k in ("low", "mean", "high"))
        assert 0 <= low <= mean <= high <= 1
        reversals = conn.execute(
            "SELECT trial FROM rule_firings WHERE session_id = ? AND actions LIKE '%reverse%' ORDER BY t",
            (session["id"],),
        ).fetchall()
        assert session["reversals"] == len(reversals) > 0
        assert session["to_criterion"] == reversals[0][0]
    # the training stage each session ran at, not the block it ended in
    assert [s["stage"] for s in body["sessions"]] == [1, 2, 2]
    page = read_only.get("/animals/RN-0501")
    # learning curve, reversals, alpha and beta trajectories, rewards
    assert page.status_code == 200 and page.text.count('class="plot"') == 5


def test_missing_things_are_404_with_short_messages(read_only):
    assert read_only.get("/api/sessions/999").json() == {"detail": "no session 999"}
    assert read_only.get("/api/animals/nobody").status_code == 404
    assert read_only.get("/sessions/999").status_code == 404
    assert read_only.get("/api/sessions/abc").status_code == 422


def test_openapi_schema_lists_the_api(read_only):
    schema = read_only.get("/api/openapi.json").json()
    paths = schema["paths"]
    for path in (
        "/api/boxes",
        "/api/sessions/{session_id}",
        "/api/sessions/{session_id}/trials",
        "/api/sessions/{session_id}/estimates",
        "/api/animals/{animal}",
        "/api/sessions/{session_id}/trials.csv",
        "/api/sessions/{session_id}/events.csv",
    ):
        assert "get" in paths[path], path
    tile = schema["components"]["schemas"]["BoxTile"]["properties"]
    assert {"box", "animal", "trial", "rewards", "accuracy", "alarms", "link"} <= set(tile)


def test_pages_render_with_plots(read_only, lab_db):
    overview = read_only.get("/")
    assert overview.status_code == 200
    assert overview.text.count('class="tile"') == 3
    assert 'src="/assets/vigil.js?v=' in overview.text and "http" not in overview.text.split("<main>")[0].replace(
        "http://www.w3.org", ""
    )  # nothing fetched from elsewhere
    session = read_only.get(f"/sessions/{lab_db['second']}")
    assert session.status_code == 200
    # cumulative record, choices, two parameters with bands, exploration, timeline
    assert session.text.count('class="plot"') == 6
    assert session.text.count('class="band ci"') == 2
    # rule firings: on the time axis of the cumulative record and the timeline, and listed
    firings = read_only.get(f"/api/sessions/{lab_db['second']}").json()["rule_firings"]
    assert session.text.count('class="vr rulefire"') == 2
    # in words, never the stored action (a list of objects)
    assert session.text.count("reversed west/east because") == len(firings)
    assert "[{" not in session.text and "&#x27;reverse&#x27;" not in session.text
    assert 'action="/sessions/' not in session.text  # read-only: no control form
    pav = read_only.get(f"/sessions/{lab_db['pav']}").text
    assert "No learning-model estimates stored" in pav and "Pavlovian conditioned approach" in pav
    assert read_only.get("/sessions").text.count("<tr>") == 7  # header + 6 sessions


def test_live_updates_stream_the_board(read_only):
    import json

    with read_only.stream("GET", "/api/live") as stream:
        assert stream.headers["content-type"].startswith("text/event-stream")
        lines = []
        for line in stream.iter_lines():
            lines.append(line)
            if line.startswith("data:"):
                break
    assert "event: board" in lines
    board = json.loads(lines[-1][len("data:") :])
    assert {t["box"] for t in board["tiles"]} == set(board["boxes"])
    assert board["tiles"][0]["shown"]["trial"].isdigit()
    # the polling fallback gets the same payload
    polled = read_only.get("/api/board").json()
    assert polled["boxes"] == board["boxes"] and polled["strip"] == board["strip"] == []


def test_cumulative_record_counts_every_response_and_marks_every_pellet(lab_db):
    import xml.etree.ElementTree as ET

    from server.store import queries
    from server.web import plots
    from server.web.svg import Plot

    svg_ns = "{http://www.w3.org/2000/svg}"
    sid = lab_db["second"]
    conn = queries.open_readonly(lab_db["path"])
    session = queries.get_session(conn, sid)
    inputs = queries.session_events(conn, sid, kind="input")
    pulses = queries.session_events(conn, sid, kind="pulse")
    trials = queries.session_trials(conn, sid)
    end_t = max(e["t"] for e in inputs + pulses)
    svg = plots.cumulative_record(
        session=session, inputs=inputs, pulses=pulses, trials=trials, blocks=[], firings=[], pauses=[], end_t=end_t
    )
    root = ET.fromstring(svg)
    # counted straight from the events table: lever presses (onsets) per lever
    counts = dict(
        sqlite3.connect(lab_db["path"])
        .execute(
            "SELECT name, count(*) FROM events WHERE session_id = ? AND kind = 'input' AND value > 0"
            " AND name LIKE 'press%' GROUP BY name ORDER BY name",
            (sid,),
        )
        .fetchall()
    )
    assert list(counts) == plots.response_inputs(session["settings"], inputs, trials)
    geometry = Plot((0.0, end_t / 60), (0.0, max(counts.values()) * 1.05), title="")
    lines = [el for el in root.iter(svg_ns + "polyline") if "ln" in el.get("class").split()]
    assert len(lines) == len(counts)
    for line, (name, count) in zip(lines, counts.items()):
        last_y = float(line.get("points").split()[-1].split(",")[1])
        assert abs(last_y - geometry.py(count)) < 0.06, name  # points are rounded to 0.1 px
    pellets = [g for g in root.iter(svg_ns + "g") if "pellet" in (g.get("class") or "").split()]
    assert len(list(pellets[0])) == session["rewards"] > 0
