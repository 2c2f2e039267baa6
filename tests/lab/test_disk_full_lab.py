"""A lab whose database sits on a small filesystem that fills up mid-session.

A 16 MB tmpfs is mounted for the test (needs root; skipped with the reason otherwise). Two
emulated boxes run quick trials; a filler file takes every free byte, so SQLite's commits
fail with "database or disk is full" for a few seconds; then the filler is removed. The
disk-nearly-full and store-unreachable alarms must reach the receiver with their all clears,
the sessions must end at their time limit as usual, and every trial and event the sessions
produced must be in the database exactly once.
"""

from __future__ import annotations

import asyncio
import errno
import os
import sqlite3
import subprocess
from pathlib import Path

import pytest
from lab_samples import Hook, write_lab

from server.lab.config import load_lab
from server.lab.supervisor import RUN_TIME_LIMIT, Lab
from server.store.writer import Store


@pytest.fixture
def small_disk(tmp_path):
    folder = tmp_path / "small"
    folder.mkdir()
    if os.geteuid() != 0:
        pytest.skip("mounting a small tmpfs needs root")
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=16m", "tmpfs", str(folder)], capture_output=True)
    if done.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {done.stderr.decode().strip()}")
    try:
        yield folder
    finally:
        subprocess.run(["umount", "-l", str(folder)], check=False)


def fill(folder: Path) -> Path:
    """Take every free byte of the filesystem with one file."""
    filler = folder / "filler.bin"
    fd = os.open(filler, os.O_WRONLY | os.O_CREAT | os.O_TRUNC)
    try:
        for size in (1 << 16, 512):  # big blocks, then the last scraps
            while True:
                try:
                    os.write(fd, b"\0" * size)
                except OSError as exc:
                    assert exc.errno == errno.ENOSPC
                    break
    finally:
        os.close(fd)
    return filler


def test_a_full_disk_mid_session_loses_nothing_and_raises_its_alarms(tmp_path, small_disk):
    boxes = [("rig-8a", "QC-0801", 81, {"latency_s": 0.1, "omission": 0.0}),
             ("rig-8b", "QC-0802", 82, {"latency_s": 0.15, "omission": 0.0})]  # fmt: skip
    with Hook() as hook:
        lab_yaml = write_lab(
            tmp_path,
            "Rig room 8",
            boxes,
            "{max_rewards: 100000, max_minutes: 10}",
            f"""\
alarms:
  disk_free_mb: 1
  send:
    - webhook: {{url: "{hook.url}"}}
      kinds: [disk_nearly_full, store_unreachable]
""",
        )
        db = small_disk / "rig8.sqlite"
        store = Store.open(db)
        said: list[str] = []
        lab = Lab(load_lab(lab_yaml), store, say=said.append, in_process_boxes=True)
        lab.disk_every_s = 0.5

        async def scenario() -> None:
            task = asyncio.create_task(lab.run(minutes=0.25))
            await asyncio.sleep(3.0)
            filler = fill(small_disk)
            await asyncio.sleep(5.0)  # commits fail meanwhile; the sessions go on
            assert store.failure is not None and "disk is full" in str(store.failure)
            assert not any(run.session.finished for run in lab.runs)
            filler.unlink()
            await asyncio.wait_for(task, 30)

        asyncio.run(scenario())
        store.close()

    assert [run.ended.reason for run in lab.runs] == [RUN_TIME_LIMIT, RUN_TIME_LIMIT]
    conn = sqlite3.connect(db)
    for run in lab.runs:
        sid = run.session_id
        trials = [t for (t,) in conn.execute("SELECT trial FROM trials WHERE session_id = ? ORDER BY trial", (sid,))]
        assert trials == list(range(1, run.session.trials_done + 1)) and len(trials) > 20
        assert len(trials) == lab.produced[(sid, "TrialRecord")]
        events = conn.execute("SELECT count(*) FROM events WHERE session_id = ?", (sid,)).fetchone()[0]
        assert events == lab.produced[(sid, "EventLogged")] + 1  # + the session-start note
        assert conn.execute("SELECT end_reason FROM sessions WHERE id = ?", (sid,)).fetchone()[0] == RUN_TIME_LIMIT
    kinds = [(b["kind"], b["state"]) for b in hook.bodies]
    assert sorted(kinds) == sorted([("disk_nearly_full", "raised"), ("disk_nearly_full", "cleared"),
                                    ("store_unreachable", "raised"), ("store_unreachable", "cleared")])  # fmt: skip
    assert any("disk is full" in s for s in said if s.startswith("warning"))
