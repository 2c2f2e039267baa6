"""Training stages across days with real `vigil run` processes and a real database."""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]

QUICK = """\
# A fast Pavlovian schedule for tests: {name}.
vigil_protocol: 1
name: {name}
wiring:
  outputs:
    cs_lever: {{kind: lever, channel: 0}}
    pellet: {{kind: feeder, channel: 5, pulse_ms: 10}}
  inputs:
    press_lever: {{kind: lever_press, channel: 0, presented_by: cs_lever}}
    magazine: {{kind: head_entry, channel: 2}}
trial_types:
  pair:
    steps:
      - step: cs
        activate: cs_lever
        wait_s: 0.4
        on_leave: {{deactivate: cs_lever}}
      - step: us
        pulse: pellet
        wait_s: 0.1
iti: 0.3
blocks:
  - block: all
    trial_types: [pair]
"""


def test_an_animal_advances_one_stage_after_two_qualifying_days(tmp_path):
    for name in ("stage one", "stage two"):
        (tmp_path / f"{name.replace(' ', '_')}.yaml").write_text(QUICK.format(name=name))
    config = tmp_path / "lab.yaml"
    config.write_text(
        textwrap.dedent("""\
        lab: stage test
        database: lab.sqlite
        boxes:
          - name: bench-1
            animal: T-77
            stages:
              - protocol: stage_one.yaml
                advance: {sessions: 2, min_trials: 3}
              - protocol: stage_two.yaml
            emulate: {agent: pavlovian, seed: 5}
        """)
    )
    db = tmp_path / "lab.sqlite"

    def day():
        result = subprocess.run([sys.executable, "-m", "server.cli", "run", str(config), "--minutes", "0.1"],
                                capture_output=True, text=True, cwd=ROOT, timeout=120)  # fmt: skip
        assert result.returncode == 0, result.stdout + result.stderr
        return result.stdout

    first = day()
    assert "at stage 1 of 2" in first and "advances to stage" not in first
    second = day()
    assert "advances to stage 2 ('stage two')" in second
    third = day()
    assert "at stage 2 of 2" in third

    conn = sqlite3.connect(db)
    protocols = [r[0] for r in conn.execute("SELECT protocol FROM sessions ORDER BY id")]
    assert protocols == ["stage one", "stage one", "stage two"]
    log = conn.execute("SELECT stage, reason, session_id, evidence FROM stage_log ORDER BY id").fetchall()
    assert [(s, r, sid) for s, r, sid, _ in log] == [(1, "start", None), (2, "advanced", 2)]
    evidence = json.loads(log[1][3])
    assert evidence["criterion"] == {"sessions": 2, "min_trials": 3}
    assert [s["session"] for s in evidence["sessions"]] == [2, 1]
    assert all(s["trials"] >= 3 for s in evidence["sessions"])

    listing = subprocess.run([sys.executable, "-m", "server.cli", "stages", "--db", str(db)],
                             capture_output=True, text=True, cwd=ROOT)  # fmt: skip
    assert listing.returncode == 0
    assert "T-77" in listing.stdout and "stage 2" in listing.stdout and "advanced" in listing.stdout
