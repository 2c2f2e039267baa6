"""The `vigil` verbs as a user runs them: real subprocesses, real files."""

from __future__ import annotations

import json
import os
import re
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from server.lab.supervisor import RUN_TIME_LIMIT

ROOT = Path(__file__).resolve().parents[2]
VIGIL = [sys.executable, "-m", "server.cli"]


def vigil(*args, timeout=120, **kw):
    return subprocess.run(
        VIGIL + list(args), capture_output=True, text=True, timeout=timeout, cwd=kw.pop("cwd", ROOT), **kw
    )


def test_check_exit_codes(tmp_path):
    ok = vigil("check", *[str(p) for p in sorted((ROOT / "protocols").glob("*.yaml"))])
    assert ok.returncode == 0, ok.stderr
    bad = tmp_path / "bad.yaml"
    bad.write_text(
        "vigil_protocol: 1\nname: x\nwiring: {outputs: {}, inputs: {}}\ntrial_types: {}\nblocks: []\nbogus: 1\n"
    )
    result = vigil("check", str(bad), str(ROOT / "protocols" / "reversal.yaml"))
    assert result.returncode == 1
    lines = result.stderr.strip().splitlines()
    assert lines and all(re.match(rf"{re.escape(str(bad))}:\d+:\d+: ", line) for line in lines)
    assert any("unknown key 'bogus'" in line for line in lines)
    assert "Traceback" not in result.stderr
    assert vigil("check").returncode == 2
    assert vigil("frobnicate").returncode == 2


def test_rehearse_json_is_deterministic_and_shaped():
    args = ("rehearse", str(ROOT / "protocols" / "reversal.yaml"), "--animals", "3", "--seed", "42", "--json")
    first, second = vigil(*args), vigil(*args)
    assert first.returncode == 0, first.stderr
    assert first.stdout == second.stdout  # byte-identical for the same seed
    data = json.loads(first.stdout)
    assert data["protocol"] == "two-lever reversal" and data["seed"] == 42
    assert len(data["animals"]) == 3
    for animal in data["animals"]:
        assert {"animal", "agent", "trials", "rewards", "duration_s", "blocks", "criterion_reached"} <= set(animal)
        assert animal["duration_s"] == pytest.approx(3600.0)
    other = vigil("rehearse", str(ROOT / "protocols" / "reversal.yaml"), "--animals", "3", "--seed", "43", "--json")
    assert other.stdout != first.stdout


def test_rehearse_same_result_with_any_worker_count():
    from server.lab.rehearsal import rehearse
    from server.protocol.load import load_protocol

    protocol = load_protocol(ROOT / "protocols" / "bandit.yaml")
    one = rehearse(protocol, 6, 9, "q_learner", workers=1)
    two = rehearse(protocol, 6, 9, "q_learner", workers=2)
    assert one == two


def test_unwritable_database_is_a_clear_error_before_any_session(tmp_path):
    result = vigil("demo", "--db", str(tmp_path / "no" / "such" / "dir" / "x.sqlite"), "--minutes", "0.05")
    assert result.returncode == 1
    assert "cannot use database" in result.stderr and "Traceback" not in result.stderr
    assert "session" not in result.stdout


def test_bad_lab_config_lists_problems(tmp_path):
    config = tmp_path / "lab.yaml"
    config.write_text(
        "boxes:\n  - name: b1\n    animal: A1\n    protocol: nowhere.yaml\n    emulate: {agent: q_lerner}\n"
    )
    result = vigil("run", str(config))
    assert result.returncode == 1
    assert "no protocol file at nowhere.yaml" in result.stderr
    assert "did you mean 'q_learner'?" in result.stderr


def _sessions(db: Path) -> list[tuple]:
    conn = sqlite3.connect(db)
    try:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        return conn.execute("SELECT id, box, end_reason, ended_at FROM sessions ORDER BY id").fetchall()
    finally:
        conn.close()


def test_demo_runs_four_boxes_and_ends_every_session(tmp_path):
    db = tmp_path / "demo.sqlite"
    result = vigil("demo", "--db", str(db), "--minutes", "0.25", "--port", "18642", timeout=180)
    assert result.returncode == 0, result.stdout + result.stderr
    sessions = _sessions(db)
    assert len(sessions) == 4
    assert all(reason == RUN_TIME_LIMIT and ended for _, _, reason, ended in sessions)
    conn = sqlite3.connect(db)
    trials = conn.execute("SELECT COUNT(*) FROM trials").fetchone()[0]
    inputs = conn.execute("SELECT COUNT(*) FROM events WHERE kind = 'input'").fetchone()[0]
    assert trials >= 4 and inputs > 0


def test_sigkill_loses_no_completed_trial_and_next_run_closes_the_session(tmp_path):
    db = tmp_path / "crash.sqlite"
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    proc = subprocess.Popen(VIGIL + ["demo", "--db", str(db), "--boxes", "2"], cwd=ROOT, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)  # fmt: skip
    try:
        deadline = time.monotonic() + 90
        committed = 0
        while time.monotonic() < deadline and committed < 3:
            time.sleep(0.5)
            if db.exists():
                conn = sqlite3.connect(db)
                try:
                    committed = conn.execute("SELECT COUNT(*) FROM trials").fetchone()[0]
                except sqlite3.OperationalError:
                    committed = 0
                finally:
                    conn.close()
        assert committed >= 3, "the demo never committed a trial"
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
    conn = sqlite3.connect(db)
    after = conn.execute("SELECT COUNT(*) FROM trials").fetchone()[0]
    conn.close()
    assert after >= committed  # nothing that was committed went missing
    assert all(reason is None for _, _, reason, _ in _sessions(db))  # killed: nobody closed them
    result = vigil("demo", "--db", str(db), "--boxes", "1", "--minutes", "0.05", timeout=120)
    assert result.returncode == 0, result.stderr
    assert "interrupted session" in result.stdout
    rows = _sessions(db)
    assert all(reason is not None for _, _, reason, _ in rows)
    assert [r[2] for r in rows[:2]] == ["interrupted", "interrupted"]


def test_ctrl_c_ends_sessions_cleanly_with_a_reason(tmp_path):
    db = tmp_path / "sigint.sqlite"
    proc = subprocess.Popen(VIGIL + ["demo", "--db", str(db), "--boxes", "2"], cwd=ROOT,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)  # fmt: skip
    try:
        deadline = time.monotonic() + 60
        started = False
        while time.monotonic() < deadline and not started:
            time.sleep(0.5)
            if db.exists():
                conn = sqlite3.connect(db)
                try:
                    started = conn.execute("SELECT COUNT(*) FROM sessions").fetchone()[0] == 2
                except sqlite3.OperationalError:
                    pass
                finally:
                    conn.close()
        time.sleep(2.0)
        proc.send_signal(signal.SIGINT)
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, out + err
    reasons = [r[2] for r in _sessions(db)]
    assert reasons == ["stopped by signal (SIGINT)"] * 2
    conn = sqlite3.connect(db)
    last_outputs = conn.execute(
        "SELECT name, value FROM events WHERE kind = 'output' AND id IN "
        "(SELECT MAX(id) FROM events WHERE kind = 'output' GROUP BY session_id, name)"
    ).fetchall()
    conn.close()
    assert last_outputs and all(value == 0.0 for _, value in last_outputs), "outputs end in the safe state"
