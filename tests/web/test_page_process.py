"""The status page in its own process beside a running lab: it is another process, its tiles
follow the lab through the feed, its controls reach the lab across the process boundary,
and each side outlives the other the right way round (a dead page, or one that cannot
listen, leaves the sessions running; an ended or killed lab takes its page, and the port,
with it)."""

from __future__ import annotations

import asyncio
import json
import os
import signal
import socket
import sqlite3
import urllib.error
import urllib.request
from pathlib import Path

import httpx
import pytest
from processes import Vigil, has_exited, page_process_of, wait_exited
from web_samples import EVIL_BOX, OPERATOR, lab_config, tile_of, until, until_tile

from server.lab.config import load_lab
from server.lab.page_process import run_lab_with_page, start_page
from server.lab.supervisor import RUN_TIME_LIMIT, Lab
from server.store.writer import Store

HERE = Path(__file__).resolve().parent
TOKEN = {"X-Vigil-Token": OPERATOR}


async def run_with_page(tmp_path: Path, body, said: list[str]) -> int:
    """Run the two-box lab in this process with its page in a child; `body(page, lab)` once
    the page serves. Returns the page process's exit code."""
    db = tmp_path / "live.sqlite"
    store = Store.open(db)
    lab = Lab(load_lab(lab_config(tmp_path)), store, say=said.append, in_process_boxes=True)
    page = await start_page(
        lab,
        db,
        host="127.0.0.1",
        port=0,
        operator_token=OPERATOR,
        viewer_token=None,
        lab_name="Bench rig 5",
        quiet_after_s=300.0,
        say=said.append,
    )
    task = asyncio.create_task(lab.run(minutes=3))
    try:
        await until(lambda: len(lab.runs) == 2)
        await asyncio.wait_for(page.end.ready.wait(), 30)
        await body(page, lab)
    finally:
        lab.stop_all("test over")
        await asyncio.wait_for(task, 15)
        code = await page.close()
        store.close()
    return code


def port_is_free(url: str) -> bool:
    """Whether a new lab could listen on the page's port now (as `bind_socket` does, with
    SO_REUSEADDR: connections the page closed may linger in TIME_WAIT, listeners may not)."""
    port = int(url.rstrip("/").rsplit(":", 1)[1])
    with socket.socket() as probe:
        probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            probe.bind(("127.0.0.1", port))
            probe.listen(1)
        except OSError:
            return False
    return True


def test_page_serves_from_its_own_process_with_live_tiles_and_controls(tmp_path):
    said: list[str] = []
    seen: dict = {}

    async def body(page, lab):
        assert page.pid != os.getpid() and page.end.page_pid == page.pid
        # Ctrl-C belongs to the lab: the page's process ignores SIGINT (and keeps serving below)
        os.kill(page.pid, signal.SIGINT)
        run = lab.runs[0]
        sid = run.session_id
        async with httpx.AsyncClient(base_url=page.url, timeout=10) as web:
            # live tiles advance through the feed
            first = await until_tile(web, sid, lambda t: t["trials_done"] >= 1)
            later = await until_tile(web, sid, lambda t: t["trials_done"] > first["trials_done"])
            assert later["live"] and later["elapsed_s"] > first["elapsed_s"]
            assert later["box"] == EVIL_BOX and later["since_input_s"] is not None
            # elapsed is the lab's session clock (give or take the feed's and cache's age)
            before = run.live.clock()
            tile = await tile_of(web, sid)
            after = run.live.clock()
            assert before - 1.0 <= tile["elapsed_s"] <= after + 0.1

            # controls cross the process boundary, with the token only
            url = f"/api/sessions/{sid}/pause"
            assert (await web.post(url)).status_code == 401
            assert (await web.post(url, headers={"X-Vigil-Token": "nope"})).status_code == 403
            assert not run.session.paused
            done = await web.post(url, headers=TOKEN)
            assert done.status_code == 200
            assert done.json() == {"session_id": sid, "box": EVIL_BOX, "action": "pause", "origin": "127.0.0.1"}
            await until(lambda: run.session.paused)  # applied by the lab, in this process
            await until_tile(web, sid, lambda t: t["state"] == "paused")
            page_html = (await web.get(f"/sessions/{sid}")).text
            assert f'action="/sessions/{sid}/control"' in page_html
            note = await web.post(
                f"/api/sessions/{sid}/annotations", headers=TOKEN, json={"text": "checked the feeder by hand"}
            )
            assert note.status_code == 201
            seen["note"] = note.json()["id"]
            assert (await web.post("/api/sessions/999/stop", headers=TOKEN)).status_code == 404
            assert (await web.post(f"/api/sessions/{sid}/stop", headers=TOKEN)).status_code == 200
            await until(lambda: run.session.finished)
            assert (await web.post(f"/api/sessions/{sid}/stop", headers=TOKEN)).status_code == 409
            assert not lab.runs[1].session.finished

            assert page.proc.returncode is None  # the SIGINT above changed nothing

            # the lab ending closes the page, even with a live stream open
            async with web.stream("GET", "/api/live") as stream:
                async for line in stream.aiter_lines():
                    if line.startswith("data:"):
                        assert json.loads(line[5:])["boxes"] == [EVIL_BOX, "rig-5b"]
                        break
                lab.stop_all("test over")
                seen["code"] = await page.close()
        seen["sid"] = sid

    asyncio.run(run_with_page(tmp_path, body, said))
    assert seen["code"] == 0  # it exited by itself on EOF, not killed after the wait
    conn = sqlite3.connect(tmp_path / "live.sqlite")
    note = conn.execute("SELECT session_id, origin, text FROM annotations WHERE id = ?", (seen["note"],)).fetchone()
    ended = conn.execute("SELECT end_reason FROM sessions WHERE id = ?", (seen["sid"],)).fetchone()
    conn.close()
    assert note == (seen["sid"], "127.0.0.1", "checked the feeder by hand")
    assert ended == ("stopped by operator (127.0.0.1)",)
    assert not [line for line in said if "warning" in line]


def test_a_dead_page_leaves_the_sessions_running(tmp_path):
    said: list[str] = []

    async def body(page, lab):
        os.kill(page.pid, signal.SIGKILL)
        await until(lambda: any("status page stopped" in line for line in said))
        run = lab.runs[0]
        done = run.session.trials_done
        await until(lambda: run.session.trials_done > done)  # the sessions go on
        assert not any(r.session.finished for r in lab.runs)
        assert port_is_free(page.url)

    code = asyncio.run(run_with_page(tmp_path, body, said))
    assert code == -signal.SIGKILL
    assert [line for line in said if "status page" in line] == [
        "warning: status page stopped (its process exited with code -9); the sessions go on"
    ]


def _get(url: str) -> int:
    try:
        with urllib.request.urlopen(url, timeout=10) as response:
            return response.status
    except urllib.error.HTTPError as err:
        return err.code


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGKILL], ids=["SIGTERM", "SIGKILL"])
def test_the_page_exits_when_the_lab_ends_however_it_ends(tmp_path, sig):
    lab = Vigil([str(lab_config(tmp_path)), str(tmp_path / "lab.sqlite")], tmp_path, script=HERE / "lab_with_page.py")
    try:
        url = lab.wait_for("status page: ")
        assert _get(url + "api/boxes") == 200
        page = page_process_of(lab.proc.pid)
        assert not has_exited(page)
        code = lab.finish(sig)
        wait_exited(page)
    finally:
        lab.kill()
    assert port_is_free(url)
    with pytest.raises(urllib.error.URLError):
        urllib.request.urlopen(url, timeout=5)
    if sig == signal.SIGTERM:  # the lab ended its sessions cleanly first
        assert code == 0 and lab.lines[-1] == ("ended: stopped by signal (SIGTERM), stopped by signal (SIGTERM)"), (
            lab.lines
        )
    else:
        assert code == -signal.SIGKILL


def test_a_busy_port_is_one_warning_and_the_sessions_run_without_a_page(tmp_path):
    said: list[str] = []
    with socket.socket() as other:  # another program already listens on the port
        other.bind(("127.0.0.1", 0))
        other.listen(1)
        port = other.getsockname()[1]
        config = load_lab(lab_config(tmp_path))
        store = Store.open(tmp_path / "busy.sqlite")
        lab = Lab(config, store, say=said.append, in_process_boxes=True)
        try:
            runs = asyncio.run(
                run_lab_with_page(lab, tmp_path / "busy.sqlite", config.web, minutes=0.02, port=port, say=said.append)
            )
        finally:
            store.close()
    assert [line for line in said if "status page" in line] == [
        f"warning: status page not started: cannot listen on 127.0.0.1:{port}: the port is already in use"
    ]
    assert [run.ended.reason for run in runs] == [RUN_TIME_LIMIT, RUN_TIME_LIMIT]
    with pytest.raises(AssertionError, match="no status page process"):
        page_process_of(os.getpid())
