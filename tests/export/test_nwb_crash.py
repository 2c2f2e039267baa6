"""A session cut short by a killed lab exports with its end reason, once the store's
recovery has closed it; its input events keep the emulated box's device clock."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

from nwb_checks import check_file

from server.export.nwb import export_nwb
from server.store.writer import Store

REPO = Path(__file__).resolve().parents[2]


def stored_trials(db: Path) -> int:
    if not db.exists():
        return 0
    try:
        conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
        try:
            return conn.execute("SELECT count(*) FROM trials").fetchone()[0]
        finally:
            conn.close()
    except sqlite3.Error:  # not created yet
        return 0


def test_a_killed_session_exports_as_interrupted(tmp_path):
    config = tmp_path / "lab.yaml"
    config.write_text(
        f"""
lab: Bench rig 9
subject: {{species: Rattus norvegicus}}
boxes:
  - name: rig-9a
    animal: LT-0091
    subject: {{sex: M, age: P9W}}
    protocol: {REPO / "protocols" / "lever_training_devaluation.yaml"}
    emulate: {{agent: random, seed: 91}}
""",
        encoding="utf-8",
    )
    db = tmp_path / "lab.sqlite"
    lab = subprocess.Popen(
        [sys.executable, "-m", "server.cli", "run", str(config), "--db", str(db), "--minutes", "10", "--port", "0"],
        cwd=tmp_path, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, start_new_session=True,
        env={**os.environ, "PYTHONPATH": str(REPO)},  # this tree's vigil, whatever else is installed
    )  # fmt: skip
    try:
        deadline = time.monotonic() + 90
        while stored_trials(db) < 3:
            assert lab.poll() is None, lab.stderr.read().decode() if lab.stderr else "the lab ended"
            assert time.monotonic() < deadline, "no trials stored in time"
            time.sleep(0.2)
    finally:
        if lab.poll() is None:
            os.killpg(lab.pid, signal.SIGKILL)  # the lab, its page and its emulated box: one group we started
        lab.wait(timeout=10)
        if lab.stderr:
            lab.stderr.close()
    with Store.open(db) as store:
        (closed,) = store.close_interrupted()  # what the next `vigil run` does first

    (done,) = export_nwb(db, tmp_path / "nwb", session_id=closed)
    seen = check_file(db, done.path, closed)
    assert seen["notes"]["end_reason"] == "interrupted"
    assert seen["trials"] >= 3
    assert {k: v for k, v in seen["subject"].items() if v} == {"species": "Rattus norvegicus", "sex": "M", "age": "P9W"}
    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    missing = conn.execute(
        "SELECT count(*) FROM events WHERE session_id = ? AND kind = 'input' AND device_t_us IS NULL", (closed,)
    ).fetchone()[0]
    assert missing == 0, "every input came over the wire with the device's clock"
    # Each pellet pulse the box acknowledged is there as applied, with the device's clock, and
    # in the file's applied_events (check_file compared every event kind's table above).
    pulses = conn.execute(
        "SELECT count(*) FROM events WHERE session_id = ? AND kind = 'pulse' AND name = 'pellet'", (closed,)
    ).fetchone()[0]
    applied = conn.execute(
        "SELECT t, device_t_us FROM events WHERE session_id = ? AND kind = 'applied' AND name = 'pellet' ORDER BY id",
        (closed,),
    ).fetchall()
    conn.close()
    assert pulses - 1 <= len(applied) <= pulses and len(applied) >= 2  # the last may be unacknowledged at the kill
    device_s = [d / 1e6 for _, d in applied]
    assert all(b > a for a, b in zip(device_s, device_s[1:])), "the device's clock runs forward"
    assert "applied_events" in seen["kinds"]
