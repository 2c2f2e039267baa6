"""Rehearsal output is byte-identical for a seed: the same protocol, cohort and seed give
exactly the stored JSON (every trial count, reversal, rule firing and the values its
condition read). A change that moves a random draw, reorders the closed loop or alters an
estimate shows up here as a diff.

Regenerate only for a change meant to alter behaviour, and say so in the commit:
    python tests/lab/test_rehearsal_golden.py --write
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
GOLDEN = Path(__file__).resolve().parent / "golden"

# protocol, agent, sessions: each protocol with the virtual animal it is written for.
CASES = [
    ("reversal", "q_learner", 2),
    ("bandit", "q_learner", 2),
    ("autoshaping", "pavlovian", 2),
    ("lever_training_devaluation", "q_learner", 1),
    ("two_stage", "two_stage_learner", 1),  # the hybrid estimator's particles, seeded
]


def rehearse_json(protocol: str, agent: str, sessions: int) -> str:
    command = [
        sys.executable, "-m", "server.cli", "rehearse", str(ROOT / "protocols" / f"{protocol}.yaml"),
        "--animals", "4", "--seed", "20261203", "--agent", agent, "--sessions", str(sessions),
        "--firings", "--json", "--workers", "1",
    ]  # fmt: skip
    done = subprocess.run(command, capture_output=True, text=True, timeout=300, cwd=ROOT, check=False)
    assert done.returncode == 0, done.stderr
    return done.stdout


@pytest.mark.parametrize(("protocol", "agent", "sessions"), CASES, ids=[c[0] for c in CASES])
def test_rehearsal_matches_golden_output(protocol: str, agent: str, sessions: int) -> None:
    expected = (GOLDEN / f"{protocol}-{agent}.json").read_text(encoding="utf-8")
    assert rehearse_json(protocol, agent, sessions) == expected


if __name__ == "__main__" and sys.argv[1:] == ["--write"]:
    for case in CASES:
        (GOLDEN / f"{case[0]}-{case[1]}.json").write_text(rehearse_json(*case), encoding="utf-8")
