"""Box physics: determinism, magazine and pellets, presentation, safe state, clear errors."""

from __future__ import annotations

import math

import numpy as np
import pytest
from box_trials import TrialLoop, new_box, two_lever_wiring

from hardware_stubs.agents import AGENTS, make_agent
from hardware_stubs.emulated_box import EmulatedBox
from server.engine.records import PulseOutput, SetOutput

FEED = PulseOutput("pellet_feeder", 4, 40)


def rising(log, name):
    return [t for t, n, r in log if n == name and r]


def falling(log, name):
    return [t for t, n, r in log if n == name and not r]


def session_log(agent_name: str, seed: int) -> list[tuple[float, str, bool]]:
    box = new_box(make_agent(agent_name), seed=seed)
    loop = TrialLoop(box, reward=lambda choice, trial: trial % 2 == 0)
    loop.run(40)
    return loop.log


@pytest.mark.parametrize("agent_name", sorted(AGENTS))
def test_same_seed_gives_the_same_event_stream(agent_name):
    first = session_log(agent_name, seed=11)
    assert len(first) > 40
    assert session_log(agent_name, seed=11) == first
    assert session_log(agent_name, seed=12) != first


def test_a_pellet_brings_a_head_entry_that_rises_then_falls():
    box = new_box(make_agent("random", check_every_s=0.0))
    loop = TrialLoop(box)
    loop.drain(3.0)
    assert loop.log == []  # nothing to do: no lever, no pellet, no spontaneous checks
    box.apply(FEED, 3.0)
    assert (box.pellets_delivered, box.pellets_waiting) == (1, 1)
    loop.drain(60.0)
    (entry,) = rising(loop.log, "head_entry")
    (leave,) = falling(loop.log, "head_entry")
    assert 3.0 < entry < leave
    # The pellet sensor sees the pellet land and sees it go when it is eaten.
    assert rising(loop.log, "pellet_seen") == [3.0]
    assert falling(loop.log, "pellet_seen") == [entry]
    assert (box.pellets_waiting, box.pellets_eaten) == (0, 1)
    assert not box.head_in


def test_pellets_pile_up_until_one_head_entry_eats_them_all():
    box = new_box(make_agent("random", check_every_s=0.0, collect_s=5.0, collect_sigma=0.0))
    loop = TrialLoop(box)
    box.apply(FEED, 1.0)
    box.apply(FEED, 2.0)
    box.apply(FEED, 3.0)
    loop.drain(40.0)
    assert len(rising(loop.log, "head_entry")) == 1  # one trip, heard the first click
    assert rising(loop.log, "pellet_seen") == [1.0]
    assert (box.pellets_delivered, box.pellets_eaten, box.pellets_waiting) == (3, 3, 0)


def test_presses_only_while_the_lever_is_extended():
    box = new_box(make_agent("random", latency_s=0.5, irt_s=0.6, omission=0.0))
    loop = TrialLoop(box)
    extended = [(10.0, 40.0), (100.0, 130.0)]
    for start, end in extended:
        loop.drain(start)
        box.apply(SetOutput("lever_west", 1, True), start)
        loop.drain(end)
        box.apply(SetOutput("lever_west", 1, False), end)
    loop.drain(300.0)
    presses = rising(loop.log, "press_west")
    for start, end in extended:
        assert sum(start < t <= end for t in presses) >= 10
    assert all(any(s < t <= e for s, e in extended) for t in presses)
    assert rising(loop.log, "press_east") == []  # never extended
    # Each press releases its switch 0.1-0.3 s later (our emulator's switch physics).
    releases = falling(loop.log, "press_west")
    assert len(releases) == len(presses)
    assert all(0.1 <= r - p <= 0.3 for p, r in zip(presses, releases))


def test_pressing_a_retracted_lever_is_refused():
    box = new_box(make_agent("random"))
    assert box.presented_operants == ()
    assert box.press("press_west") is False
    box.apply(SetOutput("lever_west", 1, True), 1.0)
    assert box.presented("press_west") and box.presented_operants == ("press_west",)
    assert box.press("press_west") is True
    assert box.press("press_west") is False  # switch still held down


def test_safe_state_retracts_everything_and_responding_stops():
    box = new_box(make_agent("q_learner", latency_s=0.5, irt_s=0.5, omission=0.0))
    loop = TrialLoop(box)
    box.apply(SetOutput("lever_west", 1, True), 0.0)
    box.apply(SetOutput("house_light", 3, True), 0.0)
    loop.drain(20.0)
    assert box.active_outputs == {"lever_west", "house_light"}
    before = len(rising(loop.log, "press_west"))
    assert before > 5
    box.safe_state()
    assert box.active_outputs == frozenset()
    loop.drain(200.0)
    assert len(rising(loop.log, "press_west")) == before


def test_other_agents_may_lick_a_spout_with_rising_and_falling_edges():
    class Licker:
        """Minimal agent of our own: licks the spout every 0.15 s, each contact 0.05 s."""

        name = "licker"

        def attach(self, box):
            self.box = box
            box.wake(1.0, 0)

        def on_presented(self, t, line, presented):
            pass

        def on_pellet(self, t):
            pass

        def on_wake(self, t, token):
            self.box.enter("spout", 0.05)
            if t < 2.0:
                self.box.wake(t + 0.15, 0)

    box = EmulatedBox(two_lever_wiring(), Licker(), np.random.default_rng(0))
    loop = TrialLoop(box)
    loop.drain(10.0)
    licks = [(t, r) for t, n, r in loop.log if n == "spout"]
    assert [r for _, r in licks] == [True, False] * 8  # wakes at 1.0, 1.15, ..., 2.05
    assert all(math.isclose(b[0] - a[0], 0.05) for a, b in zip(licks[::2], licks[1::2]))
    assert box.next_time() == math.inf


def test_bad_commands_get_short_clear_errors():
    box = new_box(make_agent("random"))
    with pytest.raises(ValueError, match=r"^unknown output 'lever_north'$"):
        box.apply(SetOutput("lever_north", 9, True), 0.0)
    with pytest.raises(ValueError, match=r"^output 'pellet_feeder' is pulsed, not held$"):
        box.apply(SetOutput("pellet_feeder", 4, True), 0.0)
    with pytest.raises(ValueError, match=r"^output 'lever_west' is held, not pulsed$"):
        box.apply(PulseOutput("lever_west", 1, 10), 0.0)
    with pytest.raises(ValueError, match=r"already lives in a box"):
        EmulatedBox(two_lever_wiring(), box._agent, np.random.default_rng(0))


def test_sync_pulses_do_not_feed():
    box = new_box(make_agent("random"))
    box.apply(PulseOutput("sync", 5, 5), 1.0)
    assert box.pellets_delivered == 0
