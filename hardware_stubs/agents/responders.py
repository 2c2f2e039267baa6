"""Instrumental responders: a uniform random animal and a Q-learning animal.

Both respond to presented operant inputs (levers, nose pokes) after a lognormal latency,
keep responding at a lognormal inter-response time while an input stays presented (so
free-operant schedules give response streams), go to the magazine when a pellet drops, and
now and then pause instead of responding (an omission, likelier as they eat).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

from hardware_stubs.agents.base import MAGAZINE_OPTIONS, VirtualAnimal
from hardware_stubs.agents.options import AgentOption
from server.protocol.wiring import OPERANT_INPUT_KINDS, InputLine

if TYPE_CHECKING:
    from hardware_stubs.emulated_box import EmulatedBox

RESPOND = 10
_MAX_OMISSION = 0.95  # a sated animal still wanders back to the lever now and then

RESPONDER_OPTIONS = MAGAZINE_OPTIONS + (
    AgentOption("latency_s", 2.0, "median latency from presentation to the first response", 0.05, 120.0),
    AgentOption("latency_sigma", 0.6, "log-scale spread of that latency", 0.0, 3.0),
    AgentOption("irt_s", 1.0, "median inter-response time while an input stays presented", 0.05, 120.0),
    AgentOption("irt_sigma", 0.7, "log-scale spread of inter-response times", 0.0, 3.0),
    AgentOption("omission", 0.05, "probability of pausing instead of responding", 0.0, 1.0),
    AgentOption("satiety", 0.001, "added to the omission probability per pellet eaten", 0.0, 1.0),
    AgentOption("pause_s", 20.0, "mean length of a pause (exponential)", 0.1, 1e5),
)


class RandomResponder(VirtualAnimal):
    """Picks uniformly among the presented operant inputs."""

    name = "random"
    summary = "responds to presented levers and pokes, choosing uniformly at random"
    OPTIONS = RESPONDER_OPTIONS

    latency_s: float
    latency_sigma: float
    irt_s: float
    irt_sigma: float
    omission: float
    satiety: float
    pause_s: float

    def __init__(self, **options: object) -> None:
        super().__init__(**options)
        self._respond: int | None = None

    def attach(self, box: EmulatedBox) -> None:
        super().attach(box)
        if box.presented_operants:  # inputs presented by nothing are there from the start
            self._engage(box.now)

    def on_presented(self, t: float, line: InputLine, presented: bool) -> None:
        if line.kind not in OPERANT_INPUT_KINDS:
            return
        if presented:
            if self._respond is None:
                self._engage(t)
        elif not self.box.presented_operants:
            if self._respond is not None:
                self.box.cancel(self._respond)
                self._respond = None
            self._start_checks(t)

    def _engage(self, t: float) -> None:
        self._stop_checks()
        self._plan_response(t, self.latency_s, self.latency_sigma)

    def _plan_response(self, t: float, median: float, sigma: float) -> None:
        draws, box = self.draws, self.box
        p_omit = self.omission + self.satiety * box.pellets_eaten
        if _MAX_OMISSION < p_omit:  # min(p_omit, _MAX_OMISSION), without the call
            p_omit = _MAX_OMISSION
        if p_omit > 0 and draws.uniform() < p_omit:
            at = t + draws.exponential(self.pause_s)
        else:
            at = t + draws.lognormal(median, sigma)
        self._respond = box.wake(at if at > self._busy_until else self._busy_until, RESPOND)

    def _act(self, t: float, token: int) -> None:
        if token != RESPOND:
            return super()._act(t, token)
        self._respond = None
        options = self.box.presented_operants
        if not options:
            return
        choice = options[0] if len(options) == 1 else self._choose(options)
        if self.box.press(choice):
            self._responded(t, choice)
        self._plan_response(t, self.irt_s, self.irt_sigma)

    def _after_visit(self, t: float, dwell_s: float) -> None:
        # Back from the magazine: a post-reinforcement pause, then responding resumes.
        if self._respond is not None:
            self.box.cancel(self._respond)
            self._plan_response(t + dwell_s, self.latency_s, self.latency_sigma)

    def _choose(self, options: tuple[str, ...]) -> str:
        return options[int(self.draws.uniform() * len(options))]

    def _responded(self, t: float, choice: str) -> None:
        pass


Q_OPTIONS = RESPONDER_OPTIONS + (
    AgentOption("alpha", 0.3, "learning rate of the Q update", 0.0, 1.0),
    AgentOption("beta", 5.0, "softmax inverse temperature", 0.0, 50.0),
    AgentOption("reward_window_s", 1.0, "a pellet this soon after a response counts as its reward", 0.01, 30.0),
)


class QLearner(RandomResponder):
    """Q-learning over the presented operant inputs with softmax choice, Q0 = 0.

    Reward is 1 when a pellet drops within `reward_window_s` of a response, else 0; a
    response that is followed by another before any pellet scores 0.
    """

    name = "q_learner"
    summary = "learns response values from pellets (Q-learning) and chooses by softmax"
    OPTIONS = Q_OPTIONS

    alpha: float
    beta: float
    reward_window_s: float

    def __init__(self, **options: object) -> None:
        super().__init__(**options)
        self.values: dict[str, float] = {}  # learned Q per input name; absent means Q0 = 0
        self._last: str | None = None
        self._last_t = -math.inf

    def learned_state(self) -> dict[str, object]:
        return {"values": dict(self.values)}

    def restore(self, state) -> None:
        self.values = dict(state.get("values", {}))

    def choice_probabilities(self, options: tuple[str, ...]) -> tuple[float, ...]:
        """Softmax P(a) = exp(beta Q(a)) / sum_b exp(beta Q(b)) (Sutton & Barto 2018, eq. 2.11)."""
        values = self.values
        qs = [values.get(o, 0.0) for o in options]
        top = max(qs)  # shifting by the maximum leaves P unchanged and avoids overflow
        weights = [math.exp(self.beta * (q - top)) for q in qs]
        total = sum(weights)
        return tuple([w / total for w in weights])

    def on_presented(self, t: float, line: InputLine, presented: bool) -> None:
        if presented and self._last is not None and t - self._last_t > self.reward_window_s:
            self._learn(0.0)
        super().on_presented(t, line, presented)

    def on_pellet(self, t: float) -> None:
        if self._last is not None and t - self._last_t <= self.reward_window_s:
            self._learn(1.0)
        super().on_pellet(t)

    def _choose(self, options: tuple[str, ...]) -> str:
        u = self.draws.uniform()
        cumulative = 0.0
        for option, p in zip(options, self.choice_probabilities(options)):
            cumulative += p
            if u < cumulative:
                return option
        return options[-1]

    def _responded(self, t: float, choice: str) -> None:
        if self._last is not None:
            self._learn(0.0)
        self._last = choice
        self._last_t = t

    def _learn(self, reward: float) -> None:
        # Q(a) <- Q(a) + alpha (r - Q(a)): the one-state Q-learning update, no successor
        # state in a trial-by-trial bandit (Sutton & Barto 2018, eq. 2.5).
        q = self.values.get(self._last, 0.0)
        self.values[self._last] = q + self.alpha * (reward - q)
        self._last = None
