"""A protocol's steps laid out for the session core's per-trial path.

The compiled Protocol is data keyed by names. Walking it by name at every step (a linear
search for the step, a fresh command for every output switched) would cost a large share
of rehearsal time, so a session prepares these tables once: each step with its output
actions as ready-made commands, and with its own wait draw and schedule state, which carry
the session's draws from one trial to the next.
"""

from __future__ import annotations

import numpy as np

from server.engine.records import PulseOutput, SetOutput
from server.engine.timing import DurationDraw, ScheduleState
from server.protocol.model import OutputActions, Protocol, Step
from server.protocol.wiring import Wiring


class OutputPlan:
    """One OutputActions as ready commands: the outputs to switch off, then on, in order, and
    the names to pulse (pulses go through the session's feeder and cap checks)."""

    __slots__ = ("off", "on", "switch", "pulse")

    def __init__(self, actions: OutputActions, commands: dict[str, tuple[SetOutput, SetOutput]]):
        self.off = actions.deactivate
        self.on = actions.activate
        self.switch = tuple(commands[name][0] for name in self.off) + tuple(commands[name][1] for name in self.on)
        self.pulse = actions.pulse


class StepPlan:
    """One step of one session: its actions, its wait draw and schedule state."""

    __slots__ = ("step", "on_enter", "on_leave", "wait", "schedule", "awaits_response", "count_keys")

    def __init__(
        self,
        step: Step,
        commands: dict[str, tuple[SetOutput, SetOutput]],
        inputs: tuple[str, ...],
        rng: np.random.Generator,
    ):
        self.step = step
        # None when there is nothing to do, so the hot path skips the call
        self.on_enter = output_plan(step.on_enter, commands)
        self.on_leave = output_plan(step.on_leave, commands)
        self.wait = DurationDraw(step.wait, rng) if step.wait is not None else None
        self.schedule = ScheduleState(step.schedule, rng) if step.schedule is not None else None
        self.awaits_response = step.awaits_response
        # keys of the trial's response counts, "step.input"
        self.count_keys = {name: f"{step.name}.{name}" for name in inputs}


def output_plan(actions: OutputActions, commands: dict[str, tuple[SetOutput, SetOutput]]) -> OutputPlan | None:
    return OutputPlan(actions, commands) if actions else None


def output_commands(wiring: Wiring) -> dict[str, tuple[SetOutput, SetOutput]]:
    """(off, on) SetOutput per output; commands are frozen, so one instance serves every use."""
    return {
        line.name: (SetOutput(line.name, line.channel, False), SetOutput(line.name, line.channel, True))
        for line in wiring.outputs.values()
    }


def pulse_commands(wiring: Wiring) -> dict[str, tuple[PulseOutput, bool]]:
    """(command, is a feeder) per pulsed output."""
    return {
        line.name: (PulseOutput(line.name, line.channel, line.pulse_ms), line.kind == "feeder")
        for line in wiring.outputs.values()
        if line.pulsed
    }


def step_plans(
    protocol: Protocol, commands: dict[str, tuple[SetOutput, SetOutput]], rng: np.random.Generator
) -> dict[str, dict[str, StepPlan]]:
    """Trial type -> step name -> plan. A Step object shared by two trial types gets one
    plan, so its wait draw and schedule state stay shared as the protocol wrote them."""
    inputs = tuple(protocol.wiring.inputs)
    by_step: dict[int, StepPlan] = {}
    plans: dict[str, dict[str, StepPlan]] = {}
    for type_name, trial_type in protocol.trial_types.items():
        steps: dict[str, StepPlan] = {}
        for step in trial_type.steps:
            plan = by_step.get(id(step))
            if plan is None:
                plan = by_step[id(step)] = StepPlan(step, commands, inputs, rng)
            steps.setdefault(step.name, plan)  # the first of a name, as TrialType.step_index finds
        plans[type_name] = steps
    return plans
