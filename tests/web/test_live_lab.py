"""The status page beside a running lab: live tiles, operator controls and what they store,
served in the lab's own loop. Emulated boxes run in process (virtual animals in real time)."""

from __future__ import annotations

import asyncio
import json
import signal
import sqlite3
import time
from pathlib import Path

import httpx
import pytest

from server.lab import Lab
from server.lab_config import load_lab
from server.store.writer import Store
from server.web import StatusServer, create_app

from web_samples import EVIL_BOX, OPERATOR, REPO

CLIENT = ("10.9.8.7", 40000)  # where the test's requests come from (the stored origin)


def lab_config(tmp_path: Path) -> Path:
    """Two boxes of our own: a lever-training rat (many quick trials) and a reversal rat."""
    path = tmp_path / "lab.yaml"
    path.write_text(f"""
lab: Bench rig 5
caps: {{max_rewards: 250, max_minutes: 30}}
boxes:
  - name: {json.dumps(EVIL_BOX)}
    animal: LT-0031
    protocol: {REPO / 'protocols' / 'lever_training_devaluation.yaml'}
    emulate: {{agent: random, seed: 77}}
  - name: rig-5b
    animal: RV-0032
    protocol: {REPO / 'protocols' / 'reversal.yaml'}
    emulate: {{agent: q_learner, seed: 78, options: {{alpha: 0.3, beta: 5.0}}}}
""", encoding="utf-8")
    return path


async def _until(check, timeout: float = 20.0, every: float = 0.05):
    deadline = time.monotonic() + timeout
    while not check():
        if time.monotonic() > deadline:
            raise AssertionError("timed out waiting for the lab")
        await asyncio.sleep(every)


async def run_with_lab(tmp_path: Path, body) -> Path:
    db = tmp_path / "live.sqlite"
    store = Store.open(db)
    lab = Lab(load_lab(lab_config(tmp_path)), store, say=lambda text: None, in_process_boxes=True)
    app = create_app(db, lab=lab, operator_token=OPERATOR)
    task = asyncio.create_task(lab.run(minutes=3))
    try:
        await _until(lambda: len(lab.runs) == 2)
        await body(app, lab)
    finally:
        lab.stop_all("test over")
        await asyncio.wait_for(task, 15)
        store.close()
    return db


def _events(db: Path, session_id: int, kind: str) -> list[dict]:
    conn = sqlite3.connect(db)
    found = [{"t": t, "detail": json.loads(d) if d else None} for t, d in conn.execute(
        "SELECT t, detail FROM events WHERE session_id = ? AND kind = ? ORDER BY id",
        (session_id, kind))]
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
            tiles = (await web.get("/api/boxes")).json()
            tile = next(t for t in tiles if t["session_id"] == sid)
            assert tile["box"] == EVIL_BOX and tile["animal"] == "LT-0031"
            assert tile["live"] and tile["state"] == "running" and tile["link"] == "up"
            assert 2 <= tile["trials_done"] <= run.session.trials_done
            assert tile["since_input_s"] is not None and tile["remaining_s"] > 0
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
            assert done.json() == {"session_id": sid, "box": EVIL_BOX, "action": "pause",
                                   "origin": CLIENT[0]}
            await _until(lambda: run.session.paused)
            await asyncio.sleep(0.3)  # the board's snapshot lives 0.25 s
            tile = next(t for t in (await web.get("/api/boxes")).json() if t["session_id"] == sid)
            assert tile["state"] == "paused"
            page = (await web.get(f"/sessions/{sid}")).text
            assert f'action="/sessions/{sid}/control"' in page  # the form, for a running session

            # the session page's form: token and action as form fields, then back to the page
            resumed = await web.post(f"/sessions/{sid}/control",
                                     data={"token": OPERATOR, "action": "resume"})
            assert resumed.status_code == 303
            assert resumed.headers["location"] == f"/sessions/{sid}?done=resumed"
            await _until(lambda: not run.session.paused)
            wrong_form = await web.post(f"/sessions/{sid}/control",
                                        data={"token": "guess", "action": "stop"})
            assert wrong_form.status_code == 403 and not run.session.finished

            note = await web.post(f"/api/sessions/{sid}/annotations",
                                  json={"text": "rat groomed at the lever for a minute"},
                                  headers={"X-Vigil-Token": OPERATOR})
            assert note.status_code == 201 and note.json()["origin"] == CLIENT[0]
            empty = await web.post(f"/api/sessions/{sid}/annotations", json={"text": ""},
                                   headers={"X-Vigil-Token": OPERATOR})
            assert empty.status_code == 422

            assert (await web.post("/api/sessions/999/stop",
                                   headers={"X-Vigil-Token": OPERATOR})).status_code == 404
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


def test_page_beside_the_lab_over_tcp_keeps_the_lab_signal_handlers(tmp_path):
    async def body(app, lab):
        server = StatusServer(app, "127.0.0.1", 0)
        serving = asyncio.create_task(server.serve())
        await _until(lambda: server.started)
        # uvicorn did not take SIGINT over: the lab's handler (installed by Lab.run) stays
        handler = signal.getsignal(signal.SIGINT)
        assert getattr(handler, "__self__", None) is not server._server
        async with httpx.AsyncClient(base_url=server.url, timeout=10) as web:
            overview = await web.get("/")
            assert overview.status_code == 200 and overview.text.count('class="tile"') == 2
            async with web.stream("GET", "/api/live") as stream:
                async for line in stream.aiter_lines():
                    if line.startswith("data:"):
                        board = json.loads(line[5:])
                        break
            assert board["boxes"] == [EVIL_BOX, "rig-5b"]
            # shutting down with a live stream open still ends promptly
            async with web.stream("GET", "/api/live"):
                started = time.monotonic()
                server.stop()
                await asyncio.wait_for(serving, 10)
                assert time.monotonic() - started < 6

    asyncio.run(run_with_lab(tmp_path, body))
