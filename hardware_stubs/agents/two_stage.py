"""A virtual animal for two-stage choice tasks: a hybrid model-based/model-free learner.

It sees only which ports or levers are lit, never the protocol. Two or more lit at once, with
no first choice pending, is a first-stage choice; the next lit set after that choice is the
second-stage state it led to (named by the ports lit there), where it chooses among them or
answers the single one; a pellet within `reward_window_s` of that answer is the trial's
reward. A single lit port with no choice pending (a centre poke that starts the trial) is
answered and learned nothing from.

The learner is the hybrid of Daw, Gershman, Seymour, Dayan & Dolan (2011), Neuron 69:1204:
- model-free values by SARSA(λ): after the second-stage answer, Q1(a1) += α (Q2(s, a2) - Q1(a1));
  after the outcome, Q2(s, a2) += α (r - Q2(s, a2)) and Q1(a1) += α λ (r - Q2(s, a2));
- model-based first-stage values Q_MB(a) = Σ_s P(s | a) max_b Q2(s, b), with P(s | a) the
  transition frequencies it has seen (Laplace-smoothed), since it is not told the structure;
- first stage: P(a) ∝ exp(β1 [w Q_MB(a) + (1 - w) Q1(a)] + p [a = its last first choice]);
  second stage: P(b | s) ∝ exp(β2 Q2(s, b)).
Values start at 0. Its own code: it shares nothing with server.models.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

from hardware_stubs.agents.options import AgentOption
from hardware_stubs.agents.responders import RESPONDER_OPTIONS, RandomResponder
from server.protocol.wiring import InputLine

TWO_STAGE_OPTIONS = RESPONDER_OPTIONS + (
    AgentOption("w", 0.5, "weight of model-based values at the first stage (0 model-free, 1 model-based)", 0.0, 1.0),
    AgentOption("alpha", 0.5, "learning rate of both stages", 0.0, 1.0),
    AgentOption("beta1", 5.0, "softmax inverse temperature at the first stage", 0.0, 50.0),
    AgentOption("beta2", 5.0, "softmax inverse temperature at the second stage", 0.0, 50.0),
    AgentOption("lam", 0.6, "eligibility trace: how much the outcome updates the first-stage value", 0.0, 1.0),
    AgentOption(
        "perseveration", 0.0, "bonus for repeating the last first-stage choice (negative: switching)", -10.0, 10.0
    ),  # fmt: skip
    AgentOption("reward_window_s", 1.0, "a pellet this soon after the second-stage answer is its reward", 0.01, 30.0),
)


class TwoStageLearner(RandomResponder):
    """Hybrid model-based/model-free learner over lit ports; see the module docstring."""

    name = "two_stage_learner"
    summary = "two-stage choices by a mix (w) of model-based and model-free values (Daw et al. 2011)"
    OPTIONS = TWO_STAGE_OPTIONS
    COHORT_VARY = ("w=0:1",)  # from habitual to goal-directed, one draw per animal

    w: float
    alpha: float
    beta1: float
    beta2: float
    lam: float
    perseveration: float
    reward_window_s: float

    def __init__(self, **options: object) -> None:
        super().__init__(**options)
        self.q1: dict[str, float] = {}  # model-free first-stage values per port
        self.q2: dict[str, dict[str, float]] = {}  # per second-stage state: value per port
        self.seen: dict[str, dict[str, int]] = {}  # first-stage port -> state -> times led there
        self._last_first: str | None = None
        self._first: str | None = None  # this trial's first choice, until its outcome
        self._state: str | None = None  # the second-stage state reached
        self._second: str | None = None  # the answer there
        self._second_t = -math.inf

    # ------------------------------------------------------------ what carries over

    def learned_state(self) -> dict[str, object]:
        return {
            "q1": dict(self.q1),
            "q2": {s: dict(v) for s, v in self.q2.items()},
            "seen": {a: dict(v) for a, v in self.seen.items()},
        }

    def restore(self, state: Mapping[str, object]) -> None:
        self.q1 = dict(state.get("q1", {}))  # type: ignore[call-overload]
        self.q2 = {s: dict(v) for s, v in dict(state.get("q2", {})).items()}  # type: ignore[call-overload]
        self.seen = {a: dict(v) for a, v in dict(state.get("seen", {})).items()}  # type: ignore[call-overload]

    # ------------------------------------------------------------ choice rules

    def model_based(self, port: str) -> float:
        """Q_MB(port): expected best second-stage value over the states it has led to."""
        counts = self.seen.get(port, {})
        states = set(self.q2) | set(counts)
        if not states:
            return 0.0
        total = sum(counts.values()) + len(states)
        return sum((counts.get(s, 0) + 1) / total * max(self.q2.get(s, {0: 0.0}).values()) for s in states)

    def first_probabilities(self, ports: tuple[str, ...]) -> tuple[float, ...]:
        drive = [
            self.beta1 * (self.w * self.model_based(a) + (1.0 - self.w) * self.q1.get(a, 0.0))
            + (self.perseveration if a == self._last_first else 0.0)
            for a in ports
        ]
        return _softmax(drive)

    def second_probabilities(self, state: str, ports: tuple[str, ...]) -> tuple[float, ...]:
        values = self.q2.get(state, {})
        return _softmax([self.beta2 * values.get(b, 0.0) for b in ports])

    # ------------------------------------------------------------ acting through the box

    def on_presented(self, t: float, line: InputLine, presented: bool) -> None:
        if presented and self._second is not None and t - self._second_t > self.reward_window_s:
            self._outcome(0.0)
        super().on_presented(t, line, presented)

    def on_pellet(self, t: float) -> None:
        if self._second is not None and t - self._second_t <= self.reward_window_s:
            self._outcome(1.0)
        super().on_pellet(t)

    def _choose(self, options: tuple[str, ...]) -> str:
        if self._first is None:
            return _draw(options, self.first_probabilities(options), self.draws.uniform())
        return _draw(options, self.second_probabilities(_state_name(options), options), self.draws.uniform())

    def _act(self, t: float, token: int) -> None:
        lit = self.box.presented_operants
        if lit and self._first is not None and self._state is None:
            self._state = _state_name(lit)  # the first lit set after the first choice
        super()._act(t, token)

    def _responded(self, t: float, choice: str) -> None:
        if self._second is not None:  # answered again before any pellet: no reward
            self._outcome(0.0)
        lit = self.box.presented_operants
        if self._first is None:
            if len(lit) > 1 or choice in self.q1:
                self._first = choice  # a first-stage choice
                self._state = None
            return
        if self._state is None:
            self._state = _state_name(lit)
        self._second, self._second_t = choice, t
        self._transition()

    def _transition(self) -> None:
        """Second-stage answer made: count the transition, SARSA step of the first stage."""
        a1, s, a2 = self._first, self._state, self._second
        assert a1 is not None and s is not None and a2 is not None
        row = self.seen.setdefault(a1, {})
        row[s] = row.get(s, 0) + 1
        values = self.q2.setdefault(s, {})
        values.setdefault(a2, 0.0)
        q1 = self.q1.get(a1, 0.0)
        self.q1[a1] = q1 + self.alpha * (values[a2] - q1)

    def _outcome(self, reward: float) -> None:
        a1, s, a2 = self._first, self._state, self._second
        assert a1 is not None and s is not None and a2 is not None
        values = self.q2[s]
        delta = reward - values[a2]
        values[a2] += self.alpha * delta
        self.q1[a1] = self.q1.get(a1, 0.0) + self.alpha * self.lam * delta
        self._last_first = a1
        self._first = self._state = self._second = None


def _state_name(ports: tuple[str, ...]) -> str:
    return "+".join(sorted(ports))


def _softmax(drive: list[float]) -> tuple[float, ...]:
    top = max(drive)
    weights = [math.exp(d - top) for d in drive]
    total = sum(weights)
    return tuple(x / total for x in weights)


def _draw(options: tuple[str, ...], probs: tuple[float, ...], u: float) -> str:
    cumulative = 0.0
    for option, p in zip(options, probs):
        cumulative += p
        if u < cumulative:
            return option
    return options[-1]
