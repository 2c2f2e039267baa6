"""The status page beside a running lab: live tiles, operator controls and what they store.

Lab and app share this test's loop here, joined by the real channel (a socketpair, the same
code as between the lab and the page's own process), so every request can be checked
against the lab's state; tests/web/test_page_process.py runs the page in its process.
Emulated boxes run in process (virtual animals in real time)."""

from __future__ import annotations

import asyncio
import json
import socket
import sqlite3
from pathlib import Path

import httpx
from web_samples import EVIL_BOX, OPERATOR, lab_config, until_tile
from web_samples import until as _until

from server.lab.config import load_lab
from server.lab.page_feed import FeedBuilder, open_lab_end
from server.lab.supervisor import Lab
from server.store.writer import Store
from server.web import create_app
from server.web.page_end import open_lab_view

CLIENT = ("10.9.8.7", 40000)  # where the test's requests come from (the stored origin)


async def run_with_lab(tmp_path: Path, body) -> Path:
    db = tmp_path / "live.sqlite"
    store = Store.open(db)
    lab = Lab(load_lab(lab_config(tmp_path)), store, say=lambda text: None, in_process_boxes=True)
    lab_sock, page_sock = socket.socketpair()
    end = await open_lab_end(lab, lab_sock)
    view = await open_lab_view(page_sock)
    channel = [asyncio.create_task(end.run()), asyncio.create_task(view.run())]
    app = create_app(db, live=view, operator_token=OPERATOR)
    task = asyncio.create_task(lab.run(minutes=3))
    try:
        await _until(lambda: len(lab.runs) == 2)
        await body(app, lab)
    finally:
        lab.stop_all("test over")
        await asyncio.wait_for(task, 15)
        end.close()
        await asyncio.wait_for(asyncio.gather(*channel), 5)  # the page's end reads EOF
        assert view.closed.is_set()
        store.close()
    # once every session has ended nothing changes: the lab sends one last feed, then none
    feed = FeedBuilder(lab)
    assert b'"finished":true' in (feed.line() or b"") and feed.line() is None
    # a change that no record announced is still found by the feed's rotating sweep
    lab.runs[1].link.connected = False
    assert b'"link_lost":true' in (feed.line() or b"")
    return db


def _events(db: Path, session_id: int, kind: str) -> list[dict]:
    conn = sqlite3.connect(db)
    found = [
        {"t": t, "detail": json.loads(d) if d else None}
        for t, d in conn.execute(
            "SELECT t, detail FROM events WHERE session_id = ? AND kind = ? ORDER BY id", (session_id, kind)
        )
    ]
    conn.close()
    return found


def test_live_tiles_and_operator_controls(tmp_path):
    seen: dict = {}

    async def body(app, lab):
        run = lab.runs[0]  # the lever-training box: a trial per earned pellet
        sid = run.session_id
        await _until(lambda: run.session.trials_done >= 2)
        transport = httpx.ASGITransport(app=app, client=CLIENT)
        async with httpx.AsyncClient(transport=transport, base_url="http://vigil.test") as web:
            tile = await until_tile(web, sid, lambda t: t["trials_done"] >= 2)
            assert tile["box"] == EVIL_BOX and tile["animal"] == "LT-0031"
            assert tile["live"] and tile["state"] == "running" and tile["link"] == "up"
            assert 2 <= tile["trials_done"] <= run.session.trials_done
            assert tile["since_input_s"] is not None and tile["remaining_s"] > 0
            # the run's --minutes (3) ends it long before the lab's 30-minute cap: time left says so
            assert tile["remaining_s"] <= 180.0
            assert tile["max_rewards"] == run.session.limits.max_rewards and tile["reversals"] == 0
            assert tile["protocol"] == "lever training and devaluation probe"
            overview = (await web.get("/")).text
            assert EVIL_BOX not in overview and "&lt;script&gt;" in overview
            assert overview.count('data-act="stop"') == 2  # live: the tiles carry controls

            url = f"/api/sessions/{sid}/pause"
            assert (await web.post(url)).status_code == 401
            assert (await web.post(url, headers={"X-Vigil-Token": "nope"})).status_code == 403
            assert (await web.post(f"{url}?token={OPERATOR}")).status_code == 400
            assert (await web.get(url, headers={"X-Vigil-Token": OPERATOR})).status_code == 405
            assert not run.session.paused
            done = await web.post(url, headers={"X-Vigil-Token": OPERATOR})
            assert done.status_code == 200
            assert done.json() == {"session_id": sid, "box": EVIL_BOX, "action": "pause", "origin": CLIENT[0]}
            await _until(lambda: run.session.paused)
            await until_tile(web, sid, lambda t: t["state"] == "paused")
            page = (await web.get(f"/sessions/{sid}")).text
            assert f'action="/sessions/{sid}/control"' in page  # the form, for a running session
            assert 'value="resume"' in page and 'value="pause"' not in page  # paused: resume only

            # the session page's form: token and action as form fields, then back to the page
            resumed = await web.post(f"/sessions/{sid}/control", data={"token": OPERATOR, "action": "resume"})
            assert resumed.status_code == 303
            assert resumed.headers["location"] == f"/sessions/{sid}?done=resumed"
            await _until(lambda: not run.session.paused)
            wrong_form = await web.post(f"/sessions/{sid}/control", data={"token": "guess", "action": "stop"})
            assert wrong_form.status_code == 403 and not run.session.finished

            # no token: refused before the body is even read (an empty or invalid note included)
            notes_url = f"/api/sessions/{sid}/annotations"
            for body in ({"content": b""}, {"json": {"text": ""}}, {"content": b"{not json"}):
                assert (await web.post(notes_url, **body)).status_code == 401
                assert (await web.post(notes_url, headers={"X-Vigil-Token": "nope"}, **body)).status_code == 403
            note = await web.post(
                f"/api/sessions/{sid}/annotations",
                json={"text": "rat groomed at the lever for a minute"},
                headers={"X-Vigil-Token": OPERATOR},
            )
            assert note.status_code == 201 and note.json()["origin"] == CLIENT[0]
            empty = await web.post(
                f"/api/sessions/{sid}/annotations", json={"text": ""}, headers={"X-Vigil-Token": OPERATOR}
            )
            assert empty.status_code == 422

            assert (await web.post("/api/sessions/999/stop", headers={"X-Vigil-Token": OPERATOR})).status_code == 404
            stopped = await web.post(f"/api/sessions/{sid}/stop", headers={"X-Vigil-Token": OPERATOR})
            assert stopped.status_code == 200
            await _until(lambda: run.session.finished)
            again = await web.post(f"/api/sessions/{sid}/stop", headers={"X-Vigil-Token": OPERATOR})
            assert again.status_code == 409
            assert not lab.runs[1].session.finished  # the other box runs on
        seen["sid"] = sid
        seen["reason"] = run.session.end_reason

    db = asyncio.run(run_with_lab(tmp_path, body))
    sid = seen["sid"]
    assert seen["reason"] == f"stopped by operator ({CLIENT[0]})"
    pauses = _events(db, sid, "pause")
    resumes = _events(db, sid, "resume")
    assert [p["detail"]["origin"] for p in pauses] == [CLIENT[0]]
    assert [r["detail"]["origin"] for r in resumes] == [CLIENT[0]]
    assert resumes[0]["t"] >= pauses[0]["t"]
    conn = sqlite3.connect(db)
    notes = conn.execute("SELECT session_id, t, origin, text, wall_time FROM annotations").fetchall()
    ended = conn.execute("SELECT end_reason FROM sessions WHERE id = ?", (sid,)).fetchone()[0]
    conn.close()
    assert len(notes) == 1
    assert notes[0][0] == sid and notes[0][1] is not None and notes[0][1] > 0
    assert notes[0][2:4] == (CLIENT[0], "rat groomed at the lever for a minute")
    assert ended == seen["reason"]
