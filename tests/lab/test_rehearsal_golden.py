"""Rehearsal output is byte-identical for a seed: the same protocol, cohort and seed give
exactly the stored JSON (every trial count, reversal, rule firing and the values its
condition read). A change that moves a random draw, reorders the closed loop or alters an
estimate shows up here as a diff.

Regenerate only for a change meant to alter behaviour, and say so in the commit:
    python tests/lab/test_rehearsal_golden.py --write
"""

from __future__ import annotations

import os
import platform
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


def rehearse_json(protocol: str, agent: str, sessions: int, env: dict[str, str] | None = None) -> str:
    command = [
        sys.executable, "-m", "server.cli", "rehearse", str(ROOT / "protocols" / f"{protocol}.yaml"),
        "--animals", "4", "--seed", "20261203", "--agent", agent, "--sessions", str(sessions),
        "--firings", "--json", "--workers", "1",
    ]  # fmt: skip
    done = subprocess.run(command, capture_output=True, text=True, timeout=300, cwd=ROOT, check=False,
                          env=None if env is None else {**os.environ, **env})  # fmt: skip
    assert done.returncode == 0, done.stderr
    return done.stdout


@pytest.mark.parametrize(("protocol", "agent", "sessions"), CASES, ids=[c[0] for c in CASES])
def test_rehearsal_matches_golden_output(protocol: str, agent: str, sessions: int) -> None:
    expected = (GOLDEN / f"{protocol}-{agent}.json").read_text(encoding="utf-8")
    assert rehearse_json(protocol, agent, sessions) == expected


# The bundled OpenBLAS picks its kernels by processor and each sums in its own order; a seed
# must give the same bytes on any machine, so no printed or compared value may pass through
# BLAS (server/models/sums.py). Forcing other kernels here stands in for other processors:
# before the sums were moved out of BLAS these three gave three different outputs.
@pytest.mark.skipif(platform.machine() not in ("x86_64", "AMD64"), reason="OpenBLAS core types named here are x86")
@pytest.mark.parametrize("coretype", ["Prescott", "Haswell"])
@pytest.mark.parametrize(("protocol", "agent", "sessions"), [CASES[0], CASES[-1]], ids=["reversal", "two_stage"])
def test_rehearsal_is_the_same_whichever_blas_kernels_run(protocol: str, agent: str, sessions: int, coretype: str):
    expected = (GOLDEN / f"{protocol}-{agent}.json").read_text(encoding="utf-8")
    assert rehearse_json(protocol, agent, sessions, {"OPENBLAS_CORETYPE": coretype}) == expected


if __name__ == "__main__" and sys.argv[1:] == ["--write"]:
    for case in CASES:
        (GOLDEN / f"{case[0]}-{case[1]}.json").write_text(rehearse_json(*case), encoding="utf-8")
