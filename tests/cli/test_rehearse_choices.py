"""`vigil rehearse --choices` writes what `vigil fit` reads, single- and two-stage."""

from __future__ import annotations

import csv
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def vigil(*args: str) -> subprocess.CompletedProcess:
    command = [sys.executable, "-m", "server.cli", *args]
    return subprocess.run(command, capture_output=True, text=True, timeout=300, cwd=ROOT)


def test_two_stage_choices_round_trip_through_vigil_fit(tmp_path):
    out = tmp_path / "choices.csv"
    done = vigil("rehearse", "protocols/two_stage.yaml", "--animals", "2", "--agent", "two_stage_learner",
                 "--workers", "1", "--choices", str(out), "--json")  # fmt: skip
    assert done.returncode == 0, done.stderr
    rows = list(csv.DictReader(out.open()))
    assert list(rows[0]) == ["animal", "session", "trial", "choice", "transition", "state", "choice2", "reward"]
    assert {r["animal"] for r in rows} == {"virtual-0001", "virtual-0002"}
    played = [r for r in rows if r["choice"]]
    assert played and all(r["transition"] in ("common", "rare") and r["state"] in ("north", "south") for r in played)
    fit = vigil("fit", str(out), "--model", "model_free", "--json")
    assert fit.returncode == 0, fit.stderr


def test_single_stage_choices_round_trip_through_vigil_fit(tmp_path):
    out = tmp_path / "choices.csv"
    done = vigil("rehearse", "protocols/reversal.yaml", "--animals", "2", "--workers", "1", "--choices", str(out))
    assert done.returncode == 0, done.stderr
    rows = list(csv.DictReader(out.open()))
    assert list(rows[0]) == ["animal", "session", "trial", "choice", "reward"]
    fit = vigil("fit", str(out), "--model", "q_learning", "--json")
    assert fit.returncode == 0, fit.stderr
