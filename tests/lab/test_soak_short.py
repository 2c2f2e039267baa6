"""A short soak (bench/soak.py) as a test: 8 faulty emulated boxes on ptys for 3 minutes (the
cable pulled every 20 s for 2 s, 2 % of lines dropped, 2 % garbage; 30-second slices after a
30-second warm-up), then one box's half hour in virtual time. The soak's own default is 32
boxes for 2 hours. Deselect with `-m 'not soak'`.

What must hold: nothing lost or duplicated (trials 1..n as the sessions counted them, every
event produced stored once, device events contiguous up to the newest the box reported),
open descriptors flat, resident memory within 5 %. Latency figures are printed, not checked."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]


@pytest.mark.soak
def test_a_short_soak_loses_nothing_and_holds_memory_and_descriptors():
    done = subprocess.run(
        [sys.executable, str(ROOT / "bench" / "soak.py"), "--boxes", "8", "--minutes", "3", "--slice-minutes",
         "0.5", "--warmup-s", "30", "--night-hours", "0.5", "--night-boxes", "1", "--json"],
        capture_output=True, text=True, timeout=420, cwd=ROOT,
    )  # fmt: skip
    assert done.stdout.strip(), done.stderr
    result = json.loads(done.stdout.strip().splitlines()[-1])
    live, night = result["live"], result["night"]
    print(json.dumps({"slices": live["slices"], "start": live["start"], "end": live["end"]}))
    assert live["store"]["problems"] == []
    assert live["store"]["trials"] > 80 and live["store"]["device_events"] > 200
    assert len([s for s in live["slices"] if s["n"]]) >= 4  # latency measured in every slice
    checks = result["checks"]
    # A line dropped just before the end is replayed before the link closes (a loss otherwise,
    # among the problems above); events written while the cable was out at the very end stay
    # on the box: printed, not checked.
    at_close = checks.pop("all_received_at_close")
    print("all received at close:", at_close, live["store"]["unreceived_at_close"] if not at_close else "")
    assert checks == {"memory": True, "fds_flat": True, "nothing_lost": True, "night_memory": True}, result
    assert live["warnings"] == []
    assert night["trials"] > 100
    assert done.returncode in (0, 1)  # 1: only when something was not received at the close
