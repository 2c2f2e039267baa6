"""kill -9 loses no committed trial and leaves a sound database (a real child process)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

from server.store import Store, queries

WRITER = Path(__file__).with_name("crash_writer.py")


def run_and_kill(db_path: Path, box: str, kill_after: int) -> tuple[int, int, int]:
    """Start the writer, SIGKILL it after `kill_after` reported trials.

    Returns (session id, last trial reported committed, device seq written before it).
    """
    child = subprocess.Popen(
        [sys.executable, str(WRITER), str(db_path), box], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
    )
    deadline = time.monotonic() + 15.0
    session_id = last_trial = last_seq = 0
    try:
        for line in child.stdout:
            word, *numbers = line.split()
            if word == "session":
                session_id = int(numbers[0])
            elif word == "committed":
                last_trial, last_seq = int(numbers[0]), int(numbers[1])
                if last_trial >= kill_after:
                    break
            assert time.monotonic() < deadline, "writer too slow"
        os.kill(child.pid, signal.SIGKILL)
        # Lines printed between our last read and the kill were committed too.
        rest, err = child.communicate(timeout=10)
    finally:
        if child.poll() is None:
            child.kill()
            child.wait()
    assert child.returncode == -signal.SIGKILL, err
    for line in rest.splitlines():
        word, *numbers = line.split()
        if word == "committed":
            last_trial, last_seq = int(numbers[0]), int(numbers[1])
    return session_id, last_trial, last_seq


def test_sigkill_loses_no_committed_trial(db_path):
    runs = [
        run_and_kill(db_path, f"shelf-4/{side}", kill_after)
        for side, kill_after in (("left", 40), ("middle", 75), ("right", 120))
    ]

    store = Store.open(db_path)
    assert store.conn.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
    # Each child closed the previous child's session at its start; the last one is still open.
    closed = store.close_interrupted()
    assert closed == [runs[-1][0]]
    store.close()

    reader = queries.open_readonly(db_path)
    for session_id, last_trial, last_seq in runs:
        stored = [t.trial for t in queries.trial_records(reader, session_id)]
        # Every trial reported committed is there, numbered without gaps.
        assert stored[:last_trial] == list(range(1, last_trial + 1))
        # Events written before a committed trial were committed with it, once each.
        seqs = [e["device_seq"] for e in queries.session_events(reader, session_id, kind="input")]
        assert seqs[:last_seq] == list(range(1, last_seq + 1))
        assert len(seqs) == len(set(seqs))
        row = queries.get_session(reader, session_id)
        assert row["end_reason"] == "interrupted"
        assert row["trials"] == len(stored)
        assert row["ended_at"] is not None
    assert queries.list_sessions(reader, running=True) == []
    reader.close()
