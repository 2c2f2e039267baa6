"""Several rigs on one PostgreSQL store (tests/pg_server.py runs a real server): two rigs
writing at once, the server stopped for 30 s mid-session, a rig killed with SIGKILL, and
controls from `vigil serve`'s page reaching the rig that runs the box."""

from __future__ import annotations

import asyncio
import json
import os
import signal
import subprocess
import threading
import time
import urllib.request

import pytest
from fastapi.testclient import TestClient
from rig_samples import (
    ROOT,
    VIGIL,
    assert_server_holds_the_spool,
    free_port,
    server_count,
    server_rows,
    spool_rows,
    start_rig,
    write_rig,
)

from server.cli.fit_sources import read_trials_db
from server.lab.config import load_lab
from server.lab.page_feed import FeedBuilder
from server.lab.supervisor import Lab
from server.protocol.problems import InvalidFile
from server.store.lab_store import open_lab_store
from server.store.writer import ID_RANGE
from server.web import table_controls
from server.web.app import close_app, create_app
from server.web.board import Board, ReadOnlyStore
from server.web.page_end import LabGone
from server.web.table_controls import TableControls


def _finish(proc, timeout=120) -> str:
    out, _ = proc.communicate(timeout=timeout)
    assert proc.returncode == 0, out
    return out


def _wait_for(what, check, timeout=60.0):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if check():
            return
        time.sleep(0.2)
    raise AssertionError(f"timed out waiting for {what}")


def test_two_rigs_write_one_store_at_once_and_one_page_shows_both(pg_cluster, tmp_path):
    url = pg_cluster.fresh_schema("rigs")
    configs = [write_rig(tmp_path, rig, url, seed=seed) for rig, seed in (("west", 11), ("east", 21))]
    procs = [start_rig(config, "--minutes", "0.2") for config in configs]
    for proc in procs:
        _finish(proc)
    rigs = dict(server_rows(url, "SELECT name, id FROM rigs"))
    assert set(rigs) == {"west", "east"} and len(set(rigs.values())) == 2
    sessions = server_rows(url, "SELECT id, rig, box, end_reason FROM sessions ORDER BY id")
    assert len(sessions) == 4
    for session_id, rig, _box, reason in sessions:
        assert session_id // ID_RANGE == rigs[rig]  # each rig's ids in its own range
        assert reason == "run time limit (--minutes)"
    for rig in ("west", "east"):
        assert_server_holds_the_spool(url, tmp_path / f"spool-{rig}.sqlite")
    store = ReadOnlyStore(url)
    try:
        tiles = Board(store=store).snapshot().tiles
    finally:
        store.close()
    assert sorted(t["box"] for t in tiles) == ["east: box-1", "east: box-2", "west: box-1", "west: box-2"]
    assert {t["rig"] for t in tiles} == {"west", "east"}
    # Every page and download of `vigil serve` reads the lab-wide store as it reads a file.
    app = create_app(url)
    try:
        with TestClient(app) as client:
            sid = sessions[0][0]
            overview = client.get("/")
            assert (
                overview.status_code == 200 and "east: box-2" in overview.text and "rigs: east stopped" in overview.text
            )
            for path in (f"/sessions/{sid}", f"/sessions/{sid}/panels", "/sessions", f"/animals/{sessions[0][1]}-R1",
                         "/api/boxes", "/api/board", f"/api/sessions/{sid}", f"/api/sessions/{sid}/trials",
                         f"/api/sessions/{sid}/trials.csv", f"/api/sessions/{sid}/events.csv"):  # fmt: skip
                assert client.get(path).status_code == 200, path
    finally:
        close_app(app)
    # `vigil fit --db` reads the same store: the bandit box's choices, as the spool has them.
    fitted = read_trials_db(url, ["west-R1"])
    spooled = spool_rows(tmp_path / "spool-west.sqlite", "SELECT count(*) FROM trials t JOIN sessions s"
                         " ON s.id = t.session_id WHERE s.animal = 'west-R1'")[0][0]  # fmt: skip
    assert fitted[0].animal == "west-R1" and len(fitted[0].choice) == spooled > 0
    # ... and `vigil serve` itself, with controls on (the operator token in its environment).
    port = free_port()
    env = {**os.environ, "VIGIL_OPERATOR_TOKEN": "op-7f3a", "PYTHONUNBUFFERED": "1"}
    serve = subprocess.Popen(VIGIL + ["serve", "--db", url, "--port", str(port)], cwd=ROOT, env=env,
                             stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)  # fmt: skip
    try:
        first_line = serve.stdout.readline()
        assert "controls through the lab-wide store" in first_line, first_line
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/api/boxes", timeout=10) as answer:
            boxes = json.load(answer)
        assert sorted(b["box"] for b in boxes) == ["east: box-1", "east: box-2", "west: box-1", "west: box-2"]
    finally:
        serve.send_signal(signal.SIGINT)
        serve.communicate(timeout=30)


def test_server_down_for_30_s_mid_session_loses_and_doubles_nothing(pg_cluster, tmp_path):
    url = pg_cluster.fresh_schema("outage")
    config = write_rig(tmp_path, "north", url, seed=31)
    proc = start_rig(config, "--minutes", "0.75")
    try:
        _wait_for(
            "events on the server",
            lambda: server_count(url, "events") > 20,
        )
        pg_cluster.stop()
        time.sleep(30.0)  # the outage: the sessions go on, the spool grows
    finally:
        pg_cluster.start()
    out = _finish(proc)
    assert "store unreachable" in out and "reachable again" in out, out
    assert_server_holds_the_spool(url, tmp_path / "spool-north.sqlite")
    # The outage spans trials: some were committed while the server was away.
    assert server_rows(url, "SELECT count(*) FROM trials")[0][0] >= 4


def test_a_rig_killed_with_sigkill_closes_its_sessions_as_interrupted_on_its_next_start(pg_cluster, tmp_path):
    url = pg_cluster.fresh_schema("kill")
    config = write_rig(tmp_path, "south", url, seed=41)
    # Another rig's open sessions are not south's to close: annex is killed too, stays down.
    procs = [start_rig(config), start_rig(write_rig(tmp_path, "annex", url, seed=51))]
    try:
        _wait_for(
            "a trial of each rig on the server",
            lambda: (
                server_count(url, "trials") > 0
                and server_rows(
                    url, "SELECT count(DISTINCT s.rig) FROM trials t JOIN sessions s ON s.id = t.session_id"
                )
                == [(2,)]
            ),
        )
    finally:
        for proc in procs:
            proc.send_signal(signal.SIGKILL)
            proc.wait(timeout=30)
    killed = server_rows(url, "SELECT id FROM sessions WHERE rig = 'south' AND end_reason IS NULL ORDER BY id")
    assert len(killed) == 2
    out = _finish(start_rig(config, "--minutes", "0.05"))
    assert "interrupted session" in out
    reasons = dict(server_rows(url, "SELECT id, end_reason FROM sessions WHERE rig = 'south'"))
    assert [reasons[sid] for (sid,) in killed] == ["interrupted", "interrupted"]
    notes = server_rows(url, "SELECT session_id FROM events WHERE name = 'closed_interrupted' ORDER BY session_id")
    assert notes == sorted(killed)
    assert_server_holds_the_spool(url, tmp_path / "spool-south.sqlite")
    annex = server_rows(url, "SELECT end_reason FROM sessions WHERE rig = 'annex'")
    assert annex == [(None,), (None,)]  # left for annex's own next start


def test_controls_from_the_page_reach_the_rig_that_runs_the_box(pg_cluster, tmp_path, monkeypatch):
    url = pg_cluster.fresh_schema("controls")
    config = load_lab(write_rig(tmp_path, "centre", url, seed=61))
    store, forwarder = open_lab_store(url, rig="centre", spool=config.spool)
    lab = Lab(config, store, forwarder=forwarder, in_process_boxes=True, say=lambda text: None)
    loop = asyncio.new_event_loop()
    thread = threading.Thread(target=lambda: loop.run_until_complete(lab.run(minutes=1.0)))
    thread.start()
    controls = TableControls(url)
    try:
        _wait_for("sessions on the server", lambda: server_count(url, "sessions") == 2)
        session_id = server_rows(url, "SELECT id FROM sessions WHERE box = 'box-1'")[0][0]
        paused = asyncio.run(controls.ask("pause", session_id, "10.0.0.7"))
        assert paused["status"] == 200 and paused["box"] == "box-1"
        noted = asyncio.run(controls.ask("annotate", session_id, "10.0.0.7", "bedding changed"))
        assert noted["status"] == 201
        _wait_for(
            "the pause and the note on the server",
            lambda: (
                server_rows(url, "SELECT count(*) FROM events WHERE kind = 'pause' AND session_id = %s", (session_id,))
                == [(1,)]
                and server_rows(url, "SELECT text FROM annotations") == [("bedding changed",)]
            ),
        )
        assert asyncio.run(controls.ask("stop", 999, "10.0.0.7"))["status"] == 404  # no such session
    finally:
        loop.call_soon_threadsafe(lab.stop_all, "test over")
        thread.join(timeout=120)
        loop.close()
        store.close()
    assert server_rows(url, "SELECT origin FROM annotations") == [("10.0.0.7 via the lab-wide store",)]
    # The rig's own page reads the forwarder's state as its store line.
    assert lab.store_line() == "store: up to date"
    assert b'"store":"store: up to date"' in FeedBuilder(lab).line()
    # The rig is gone now: a control waits WAIT_S, is withdrawn, and says so.
    monkeypatch.setattr(table_controls, "WAIT_S", 0.3)
    with pytest.raises(LabGone, match="did not answer"):
        asyncio.run(controls.ask("resume", session_id, "10.0.0.7"))
    assert server_rows(url, "SELECT status FROM controls ORDER BY id DESC LIMIT 1") == [(504,)]
    controls.close()


def test_the_lab_config_takes_a_server_url_and_a_spool(tmp_path):
    url = "postgresql://vigil@labdb.local/vigil"
    config = load_lab(write_rig(tmp_path, "west", url, seed=1))
    assert config.database == url and config.spool == tmp_path / "spool-west.sqlite"
    plain = tmp_path / "plain.yaml"
    plain.write_text(write_rig(tmp_path, "east", url, seed=2).read_text().replace("spool: spool-east.sqlite\n", ""))
    assert load_lab(plain).spool == tmp_path / "vigil-spool-east.sqlite"  # beside the config
    wrong = tmp_path / "wrong.yaml"
    wrong.write_text(plain.read_text().replace(url, "mysql://vigil@labdb.local/vigil"))
    with pytest.raises(InvalidFile) as failed:
        load_lab(wrong)
    assert [p.message for p in failed.value.problems] == [
        "database: 'mysql://' is not a store vigil knows; use a file path or postgresql://"
    ]
