"""The rules' trial window: responses per minute worked by hand, and what the window holds.

A box keeps recent trials for windowed rule quantities all night; the 32-box soak
(bench/soak.py) found 500 whole trials per box (steps, counts and latencies by input: about a
kilobyte each) to be the lab's steadiest memory growth. The window now keeps as many trials
as the protocol's rules read, each as a slim record."""

from __future__ import annotations

import tracemalloc
from dataclasses import replace
from pathlib import Path

from server.engine.records import TrialOutcome
from server.protocol.load import load_protocol, parse_protocol
from server.rules.metrics import HISTORY, SessionMetrics, longest_windows

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


def with_rule(condition: str):
    """The example protocol with one rule more (an alarm: it changes no schedule)."""
    text = PROTOCOL.read_text()
    extra = f'  - rule: watch_window\n    when: "{condition}"\n    do: {{alarm: "looked"}}\n'
    return parse_protocol(text.replace("rules:\n", "rules:\n" + extra, 1), str(PROTOCOL))


def test_the_window_is_as_long_as_the_longest_the_rules_read():
    base = load_protocol(PROTOCOL)
    trials, scored = longest_windows(with_rule("median_latency(40) > 9 and accuracy(60) > 0.9"))
    assert trials == max(40, longest_windows(base)[0]) and scored == max(60, longest_windows(base)[1])
    assert longest_windows(replace(base, rules=())) == (0, 0)
    metrics = SessionMetrics(with_rule("median_latency(40) > 9"))
    assert metrics.recent.maxlen == max(40, longest_windows(base)[0])


def test_accuracy_counts_only_scored_trials():
    metrics = SessionMetrics(with_rule("accuracy(3) > 0.5"))
    for n, correct in enumerate([True, None, False, None, True], start=1):  # None: no best option
        metrics.add(replace(trial(n, {}), correct=correct))
    assert metrics.accuracy(3) == 2 / 3  # True, False, True: the trials without a verdict skipped
    assert metrics.accuracy(4) is None


def test_a_full_window_holds_a_slim_trial_each():
    protocol = with_rule("median_latency(500) > 100")
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
