"""A Pavlovian approach animal: sign-tracks (works the lever CS) or goal-tracks (the magazine).

An extended lever is a CS. The CS-pellet association V grows by Rescorla-Wagner on every
CS followed by a pellet and shrinks on every CS without one. How strongly and how soon the
animal approaches during a CS follows V; where it approaches follows `sign_bias`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

from hardware_stubs.agents.base import MAGAZINE_OPTIONS, VirtualAnimal
from hardware_stubs.agents.options import AgentOption
from server.protocol.wiring import OPERANT_INPUT_KINDS, InputLine

TO_LEVER = 20
TO_MAGAZINE = 21
TRACKING_BIAS = {"sign": 1.0, "goal": -1.0, "intermediate": 0.0}

PAVLOVIAN_OPTIONS = MAGAZINE_OPTIONS + (
    AgentOption("tracking", None, "sign, goal or intermediate (instead of sign_bias)", choices=tuple(TRACKING_BIAS)),
    AgentOption("sign_bias", None, "+1 approaches only the lever, -1 only the magazine", -1.0, 1.0),
    AgentOption("learning_rate", 0.1, "Rescorla-Wagner rate (alpha times beta) of the CS", 0.0, 1.0),
    AgentOption("baseline", 0.05, "chance of approaching on a trial before any learning", 0.0, 1.0),
    AgentOption("latency_s", 1.0, "median approach latency once the CS is learned", 0.05, 60.0),
    AgentOption("naive_latency_s", 5.0, "median approach latency before learning", 0.05, 120.0),
    AgentOption("latency_sigma", 0.5, "log-scale spread of approach latencies", 0.0, 3.0),
    AgentOption("press_irt_s", 1.5, "median time between lever presses once learned", 0.05, 60.0),
    AgentOption("entry_gap_s", 1.0, "median time between head entries during the CS", 0.05, 60.0),
    AgentOption("irt_sigma", 0.5, "log-scale spread of those times", 0.0, 3.0),
    AgentOption("reward_window_s", 1.0, "a pellet this soon after CS offset is its US", 0.01, 30.0),
)


class PavlovianApproacher(VirtualAnimal):
    """Lever presses (sign-tracking) or head entries (goal-tracking) during a lever CS."""

    name = "pavlovian"
    summary = "approaches a lever CS (sign-tracking) or the magazine (goal-tracking)"
    OPTIONS = PAVLOVIAN_OPTIONS

    tracking: str | None
    learning_rate: float
    baseline: float
    latency_s: float
    naive_latency_s: float
    latency_sigma: float
    press_irt_s: float
    entry_gap_s: float
    irt_sigma: float
    reward_window_s: float

    @classmethod
    def cross_check(cls, values: Mapping[str, object]) -> list[str]:
        if values["tracking"] is not None and values["sign_bias"] is not None:
            return [f"agent {cls.name!r} takes 'tracking' or 'sign_bias', not both"]
        return []

    def __init__(self, **options: object) -> None:
        super().__init__(**options)
        given = self.options["sign_bias"]
        tracking = self.options["tracking"]
        self.sign_bias: float = TRACKING_BIAS[tracking] if tracking is not None else 0.0 if given is None else given
        self.v = 0.0  # CS-pellet associative strength, V0 = 0, asymptote 1
        self.cs_trials = 0
        self._cs: str | None = None
        self._cs_off = -math.inf
        self._unsettled = False  # the last CS has not yet been paired or found unpaired
        self._lever: int | None = None
        self._goal: int | None = None

    def learned_state(self) -> dict[str, object]:
        return {"v": self.v, "cs_trials": self.cs_trials}

    def restore(self, state) -> None:
        self.v = float(state.get("v", 0.0))
        self.cs_trials = int(state.get("cs_trials", 0))

    def on_presented(self, t: float, line: InputLine, presented: bool) -> None:
        if line.kind not in OPERANT_INPUT_KINDS:
            return
        if presented and self._cs is None:
            self._cs_onset(t, line.name)
        elif not presented and line.name == self._cs:
            self._cs_offset(t)

    def on_pellet(self, t: float) -> None:
        if self._unsettled and (self._cs is not None or t - self._cs_off <= self.reward_window_s):
            self._learn(1.0)
        super().on_pellet(t)

    def _cs_onset(self, t: float, lever: str) -> None:
        if self._unsettled:
            self._learn(0.0)  # the previous CS ended without a pellet
        self._cs = lever
        self._unsettled = True
        self.cs_trials += 1
        self._stop_checks()
        draws, v, floor = self.draws, self.v, self.baseline
        latency = self.latency_s + (self.naive_latency_s - self.latency_s) * (1.0 - v)
        p_lever = floor + (1.0 - floor) * v * (1.0 + self.sign_bias) / 2.0
        p_goal = floor + (1.0 - floor) * v * (1.0 - self.sign_bias) / 2.0
        if draws.uniform() < p_lever:
            at = t + draws.lognormal(latency, self.latency_sigma)
            self._lever = self.box.wake(at, TO_LEVER)
        if draws.uniform() < p_goal:
            at = t + draws.lognormal(latency, self.latency_sigma)
            self._goal = self.box.wake(at, TO_MAGAZINE)

    def _cs_offset(self, t: float) -> None:
        for handle in (self._lever, self._goal):
            if handle is not None:
                self.box.cancel(handle)
        self._lever = self._goal = self._cs = None
        self._cs_off = t
        self._start_checks(t)

    def _act(self, t: float, token: int) -> None:
        box, draws = self.box, self.draws
        if token == TO_LEVER:
            if box.head_in:  # finish the head entry first
                self._lever = box.wake(box.head_until + 0.2, TO_LEVER)
                return
            box.press(self._cs)
            # Presses come faster as the association grows (more vigorous sign-tracking).
            irt = draws.lognormal(self.press_irt_s * (2.0 - self.v), self.irt_sigma)
            self._lever = box.wake(t + irt, TO_LEVER)
        elif token == TO_MAGAZINE:
            dwell = self._visit_magazine(t)
            gap = draws.lognormal(self.entry_gap_s, self.irt_sigma)
            self._goal = box.wake(t + dwell + gap, TO_MAGAZINE)
        else:
            super()._act(t, token)

    def _learn(self, outcome: float) -> None:
        # Rescorla & Wagner (1972): dV = alpha*beta*(lambda - V), lambda = 1 with the US.
        self.v += self.learning_rate * (outcome - self.v)
        self._unsettled = False
