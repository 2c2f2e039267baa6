"""`vigil serve` and the page beside `vigil demo`, as a user starts them (child processes)."""

from __future__ import annotations

import json
import signal
import sqlite3
import time
import urllib.error
import urllib.request

import pytest
from processes import Vigil, page_process_of, wait_exited


def _get(url: str) -> tuple[int, str]:
    try:
        with urllib.request.urlopen(url, timeout=10) as response:
            return response.status, response.read().decode()
    except urllib.error.HTTPError as err:
        return err.code, err.read().decode()


def test_demo_prints_its_url_and_token_and_keeps_its_own_ctrl_c(tmp_path):
    db = tmp_path / "demo.sqlite"
    demo = Vigil(["demo", "--boxes", "1", "--port", "0", "--db", str(db), "--minutes", "3"], tmp_path)
    try:
        url = demo.wait_for("status page: ")
        token = demo.wait_for("operator token for this run (pause, stop, notes): ")
        assert url.startswith("http://127.0.0.1:") and len(token) >= 20
        deadline = time.monotonic() + 60
        while True:  # the page answers at once; the box's tile appears once its session starts
            status, body = _get(url + "api/boxes")
            assert status == 200
            if json.loads(body):
                break
            assert time.monotonic() < deadline, "no box tile within 60 s"
            time.sleep(0.2)
        assert json.loads(body)[0]["box"] == "rack-1"
        status, _ = _get(url + "api/boxes?token=" + token)
        assert status == 400
        page = page_process_of(demo.proc.pid)  # the page is served by a process of its own
        code = demo.finish(signal.SIGINT)
        wait_exited(page)  # and it ends with the lab
    finally:
        demo.kill()
    with pytest.raises(urllib.error.URLError):
        urllib.request.urlopen(url, timeout=5)
    # Ctrl-C reached the lab, not the web server: the session ended cleanly and was recorded
    assert code == 0, demo.lines
    assert any("stopped by signal (SIGINT)" in line for line in demo.lines), demo.lines
    conn = sqlite3.connect(db)
    assert conn.execute("SELECT end_reason FROM sessions").fetchall() == [("stopped by signal (SIGINT)",)]
    conn.close()


def test_serve_is_read_only_and_stops_on_sigterm(tmp_path, lab_db):
    serve = Vigil(["serve", "--db", str(lab_db["path"]), "--port", "0"], tmp_path)
    try:
        url = serve.wait_for("status page (read-only): ")
        status, body = _get(url + "api/boxes")
        assert status == 200 and {t["box"] for t in json.loads(body)} >= {"rack-1", "rack-2"}
        request = urllib.request.Request(url + f"api/sessions/{lab_db['second']}/stop", method="POST")
        try:
            urllib.request.urlopen(request, timeout=10)
            code = 200
        except urllib.error.HTTPError as err:
            code = err.code
        assert code in (404, 405)
        assert serve.finish(signal.SIGTERM) == 0
    finally:
        serve.kill()


def test_serve_refuses_the_lan_without_a_viewer_token_and_a_missing_database(tmp_path, lab_db):
    lan = Vigil(
        ["serve", "--db", str(lab_db["path"]), "--host", "0.0.0.0", "--port", "0"],
        tmp_path,
        env={"VIGIL_VIEWER_TOKEN": ""},
    )
    assert lan.finish(None) == 1
    assert "VIGIL_VIEWER_TOKEN" in lan.lines[-1]
    missing = Vigil(["serve", "--db", str(tmp_path / "none.sqlite"), "--port", "0"], tmp_path)
    assert missing.finish(None) == 1
    assert missing.lines[-1].startswith("vigil: cannot read database") and "no such file" in missing.lines[-1]
