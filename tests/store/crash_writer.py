"""Child process for the crash test: writes a session as fast as it can until it is killed.

Usage: python crash_writer.py DB_PATH BOX
Prints "session ID", then after each committed trial "committed TRIAL LAST_DEVICE_SEQ",
so the parent knows exactly what the store promised was on disk when the kill came.
"""

from __future__ import annotations

import sys
import time

from server.engine.records import BlockStarted, EventLogged, TrialRecord
from server.store import Store


def main(db_path: str, box: str) -> None:
    store = Store.open(db_path)
    store.close_interrupted()  # what the next `vigil run` does first
    session_id = store.begin_session(box, "R-201", "flip-flop", None, None, seed=99)
    print(f"session {session_id}", flush=True)
    store.write(
        session_id,
        BlockStarted(
            t=0.0, block="acquire", block_index=1, contingencies={"left": 0.8, "right": 0.2}, outcomes_withheld=False
        ),
    )
    seq = 0
    trial = 0
    t = 0.0
    while True:
        trial += 1
        for _ in range(5):  # a few presses and head entries per trial, as a box would send
            seq += 1
            t += 0.1
            store.write(
                session_id,
                EventLogged(t=t, kind="input", name="press_left", value=1.0, device_t_us=seq * 100_000, device_seq=seq),
            )
            store.flush_due(time.monotonic())
        store.write(
            session_id,
            TrialRecord(
                trial=trial,
                block="acquire",
                block_index=1,
                trial_type="free-choice",
                t_start=t - 0.5,
                t_end=t,
                choice="left",
                response="press_left",
                latency_s=0.4,
                rewarded=trial % 2 == 1,
                reward=float(trial % 2),
                correct=True,
                omission=False,
                interrupted=False,
                iti_s=0.0,
            ),
        )
        print(f"committed {trial} {seq}", flush=True)


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2])
