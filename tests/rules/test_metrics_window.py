"""The rules' trial window: responses per minute worked by hand, and what the window holds.

A box keeps its last 500 trials for windowed rule quantities all night; the 32-box soak
(bench/soak.py) found whole trials (steps, counts and latencies by input: about a kilobyte
each) to be the lab's steadiest memory growth, so the window keeps only what it reads."""

from __future__ import annotations

import tracemalloc
from pathlib import Path

from server.engine.records import TrialOutcome
from server.protocol.load import load_protocol
from server.rules.metrics import HISTORY, SessionMetrics

PROTOCOL = Path(__file__).resolve().parents[2] / "protocols" / "reversal.yaml"


def trial(n: int, counts: dict[str, int]) -> TrialOutcome:
    steps = tuple((name, n * 30.0 + i) for i, name in enumerate(("ready", "choose", "collect", "rest", "wait")))
    first = {key: 0.5 + i for i, key in enumerate(counts)}
    return TrialOutcome(
        n, "forward", 1, "lever_trial", n * 30.0, n * 30.0 + 20.0, "west", "press_west", 1.25, True, 1.0, True,
        False, False, steps=steps, counts=dict(counts), first_s=first,
    )  # fmt: skip


def test_responses_per_minute_counts_operant_inputs_only():
    metrics = SessionMetrics(load_protocol(PROTOCOL))
    # Trials 1-3 from 30 s to 110 s (80 s): lever presses 3 + 1 + 2 = 6, head entries ignored.
    for n, counts in enumerate(
        [{"choose.press_west": 3, "collect.trough": 4}, {"choose.press_east": 1}, {"choose.press_west": 2}], start=1
    ):
        metrics.add(trial(n, counts))
    assert metrics.responses_per_minute(3) == 6 / (80.0 / 60.0)
    assert metrics.responses_per_minute(4) is None  # fewer trials than the window


def test_a_full_window_holds_a_slim_trial_each():
    protocol = load_protocol(PROTOCOL)
    counts = {"choose.press_west": 3, "choose.press_east": 1, "collect.trough": 2, "wait.trough": 1}
    metrics = SessionMetrics(protocol)
    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        for n in range(1, HISTORY + 1):
            metrics.add(trial(n, counts))  # each trial is gone after the call unless the window keeps it
        held = tracemalloc.get_traced_memory()[0] - before
    finally:
        tracemalloc.stop()
    assert len(metrics.recent) == HISTORY
    # Measured here: ~240 bytes per trial kept (a slotted record of nine fields and its floats)
    # against ~1.2 KB when the window kept whole trials.
    assert held < HISTORY * 400, held
