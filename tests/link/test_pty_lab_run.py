"""`vigil run` end to end on the example lab with faults on every box: each box is an emulated
box process on a pty (unplugged every 10 s for 2 s, 2 % of lines dropped, 2 % garbage), and
the database must show every session ended, the losses and returns, and device events with
no gap and no duplicate in device_seq."""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
from pathlib import Path

import yaml

from server.lab.supervisor import RUN_TIME_LIMIT

ROOT = Path(__file__).resolve().parents[2]
FAULTS = {"unplug_every_s": 10, "unplug_for_s": 2, "drop_rate": 0.02, "garbage_rate": 0.02}


def test_vigil_run_with_faults_on_every_box_loses_nothing(tmp_path):
    config = yaml.safe_load((ROOT / "config.example.yaml").read_text())
    for box in config["boxes"]:
        box["protocol"] = str(ROOT / box["protocol"])
        box["emulate"]["faults"] = dict(FAULTS)
    lab = tmp_path / "lab.yaml"
    lab.write_text(yaml.safe_dump(config))
    db = tmp_path / "lab.sqlite"
    done = subprocess.run(
        [sys.executable, "-m", "server.cli", "run", str(lab), "--db", str(db), "--minutes", "0.75"],
        capture_output=True, text=True, timeout=180, cwd=tmp_path,
    )  # fmt: skip
    assert done.returncode == 0, done.stdout + done.stderr
    assert "Traceback" not in done.stderr

    conn = sqlite3.connect(db)
    sessions = conn.execute("SELECT id, box, end_reason FROM sessions ORDER BY id").fetchall()
    assert [box for _, box, _ in sessions] == [b["name"] for b in config["boxes"]]
    cut_trials = 0
    for session_id, box, reason in sessions:
        assert reason == RUN_TIME_LIMIT, box
        kinds = [k for (k,) in conn.execute(
            "SELECT kind FROM events WHERE session_id = ? AND kind LIKE 'link_%' ORDER BY t",
            (session_id,))]  # fmt: skip
        # 45 s with a 2 s outage every 10 s: four losses, each followed by its return.
        pairs = len(kinds) // 2
        assert pairs >= 3 and kinds[: 2 * pairs] == ["link_lost", "link_restored"] * pairs, box
        seqs = [s for (s,) in conn.execute(
            "SELECT device_seq FROM events WHERE session_id = ? AND device_seq IS NOT NULL"
            " ORDER BY device_seq", (session_id,))]  # fmt: skip
        assert seqs and seqs == list(range(seqs[0], seqs[0] + len(seqs))), box
        details = [json.loads(d) for (d,) in conn.execute(
            "SELECT detail FROM events WHERE session_id = ? AND kind = 'link_lost'", (session_id,))]  # fmt: skip
        assert all("trial" in d and d["reason"] for d in details), box
        alarms = conn.execute(
            "SELECT count(*) FROM events WHERE session_id = ? AND kind = 'alarm' AND detail LIKE"
            " '%events_lost%'", (session_id,)).fetchone()[0]  # fmt: skip
        assert alarms == 0, box  # the ring held everything across each 2 s outage
        # A trial in progress when the link went is stored as interrupted, and only such trials.
        losses = [t for (t,) in conn.execute(
            "SELECT t FROM events WHERE session_id = ? AND kind = 'link_lost'", (session_id,))]  # fmt: skip
        cut = conn.execute(
            "SELECT t_start, t_end, extra FROM trials WHERE session_id = ? AND interrupted = 1"
            " AND extra LIKE '%link lost%'", (session_id,)).fetchall()  # fmt: skip
        for t_start, t_end, _ in cut:
            assert any(t_start <= t <= t_end for t in losses), box
        cut_trials += len(cut)
    # 4 boxes x 3-4 outages: the lever-training box is always mid-trial, so some trial was cut
    assert cut_trials > 0
