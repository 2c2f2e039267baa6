"""Shared pieces for the emulated-box tests: a small wiring and a hand-written trial loop.

The loop below is deliberately tiny and independent of the session core, so these tests
check the emulator and the agents on their own.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from hardware_stubs.emulated_box import EmulatedBox
from server.engine.records import PulseOutput, SetOutput
from server.protocol.wiring import InputLine, OutputLine, Wiring


def two_lever_wiring() -> Wiring:
    """Box of our own: two retractable levers, house light, feeder, magazine, pellet sensor."""
    outputs = [
        OutputLine("lever_west", "lever", 1),
        OutputLine("lever_east", "lever", 2),
        OutputLine("house_light", "house_light", 3),
        OutputLine("pellet_feeder", "feeder", 4, pulse_ms=40),
        OutputLine("sync", "sync", 5, pulse_ms=5),
    ]
    inputs = [
        InputLine("press_west", "lever_press", 1, presented_by="lever_west"),
        InputLine("press_east", "lever_press", 2, presented_by="lever_east"),
        InputLine("head_entry", "head_entry", 3),
        InputLine("pellet_seen", "pellet_sensor", 4),
        InputLine("spout", "lick", 5),
    ]
    return Wiring({o.name: o for o in outputs}, {i.name: i for i in inputs})


LEVER_OF = {"press_west": "lever_west", "press_east": "lever_east"}


@dataclass
class TrialLoop:
    """Discrete trials: extend levers, first press (or window end) retracts them, maybe a pellet.

    `reward(choice, trial)` says whether a press earns a pellet; `log` keeps every input
    edge as (time, input, rising).
    """

    box: EmulatedBox
    presses: tuple[str, ...] = ("press_west", "press_east")
    window_s: float = 10.0
    iti_s: float = 20.0
    reward: Callable[[str, int], bool] = lambda choice, trial: False
    t: float = 5.0
    log: list[tuple[float, str, bool]] = field(default_factory=list)

    def set_levers(self, active: bool, t: float) -> None:
        for name in self.presses:
            line = self.box.wiring.outputs[LEVER_OF[name]]
            self.box.apply(SetOutput(line.name, line.channel, active), t)

    def feed(self, t: float) -> None:
        self.box.apply(PulseOutput("pellet_feeder", 4, 40), t)

    def drain(self, until: float) -> None:
        """Hand out every event up to `until` without reacting to it."""
        while (t := self.box.next_time()) <= until:
            self.log.extend((w, e.name, e.rising) for w, e in self.box.pop_due(t))

    def trial(self, index: int) -> tuple[str | None, float | None]:
        """Run one trial; returns (choice, latency) with None, None for an omission."""
        start = self.t
        self.set_levers(True, start)
        choice, when = None, start + self.window_s
        while choice is None and (t := self.box.next_time()) <= start + self.window_s:
            for w, e in self.box.pop_due(t):
                self.log.append((w, e.name, e.rising))
                if choice is None and e.rising and e.name in self.presses:
                    choice, when = e.name, w
        self.set_levers(False, when)
        if choice is not None and self.reward(choice, index):
            self.feed(when)
        self.t = when + self.iti_s
        self.drain(self.t)
        return choice, (when - start if choice is not None else None)

    def run(self, n: int) -> list[tuple[str | None, float | None]]:
        return [self.trial(i) for i in range(n)]


def new_box(agent, seed: int = 7, wiring: Wiring | None = None) -> EmulatedBox:
    return EmulatedBox(wiring or two_lever_wiring(), agent, np.random.default_rng(seed))
