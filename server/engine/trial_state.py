"""The trial in progress: what the session core keeps while a trial runs."""

from __future__ import annotations

import math

from server.engine.step_plans import StepPlan
from server.engine.timing import ScheduleState
from server.protocol.model import Step, TrialType


class TrialState:
    """Mutable state of the trial in progress (one per trial, dropped when it ends)."""

    __slots__ = (
        "index", "type", "plans", "t_start", "plan", "step_t0", "deadline", "schedule",
        "steps", "counts", "first_s", "choice", "response", "latency_s", "correct",
        "omission", "pellets", "offered_choice", "cut_reason",
    )  # fmt: skip

    def __init__(self, index: int, trial_type: TrialType, plans: dict[str, StepPlan], t: float):
        self.index = index
        self.type = trial_type
        self.plans = plans  # step name -> plan, for this trial type
        self.t_start = t
        self.plan: StepPlan | None = None  # the step in progress (None before the first / once left)
        self.step_t0 = t
        self.deadline = math.inf
        self.schedule: ScheduleState | None = None
        self.steps: list[tuple[str, float]] = []
        self.counts: dict[str, int] = {}
        self.first_s: dict[str, float] = {}
        self.choice: str | None = None
        self.response: str | None = None
        self.latency_s: float | None = None
        self.correct: bool | None = None
        self.omission = False
        self.pellets = 0
        self.offered_choice = False  # went through a step with `choose`
        self.cut_reason: str | None = None  # set when something outside cut the trial short

    @property
    def step(self) -> Step:
        assert self.plan is not None
        return self.plan.step
