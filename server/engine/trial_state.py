"""The trial in progress: what the session core keeps while a trial runs."""

from __future__ import annotations

import math

from server.engine.records import SecondStage
from server.engine.step_plans import StepPlan
from server.engine.timing import ScheduleState
from server.protocol.model import Step, TrialType


class TrialState:
    """Mutable state of the trial in progress (one per trial, dropped when it ends)."""

    __slots__ = (
        "index", "type", "plans", "t_start", "plan", "step_t0", "deadline", "schedule",
        "steps", "counts", "first_s", "choice", "response", "latency_s", "correct",
        "omission", "pellets", "offered_choice", "cut_reason", "state", "common", "choice2",
        "response2", "latency2_s", "omitted2",
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
        # Two-stage trials: the state the first choice led to, and what happened there.
        self.state: str | None = None
        self.common = False
        self.choice2: str | None = None
        self.response2: str | None = None
        self.latency2_s: float | None = None
        self.omitted2 = False

    def second_stage(self) -> SecondStage | None:
        if self.state is None:
            return None
        return SecondStage(self.state, self.common, self.choice2, self.response2, self.latency2_s, self.omitted2)

    @property
    def step(self) -> Step:
        assert self.plan is not None
        return self.plan.step
