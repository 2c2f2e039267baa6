"""The compiled protocol: immutable data that the session core interprets.

Everything here has been validated; references between parts are resolved names that are
known to exist, so the engine never re-checks them.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from server.protocol.expressions import Node, Quantity
from server.protocol.problems import Problem
from server.protocol.wiring import Wiring

END_TRIAL = "end"  # step target that ends the trial
END_SESSION = "end_session"  # block target that ends the session

SCHEDULE_KINDS = ("FR", "VR", "RR", "FI", "VI")
ORDERS = ("shuffled", "in_turn")


@dataclass(frozen=True, slots=True)
class Duration:
    """A duration in seconds: fixed, uniform, truncated exponential or drawn from a list."""

    kind: str  # fixed | uniform | exponential | list
    value: float = 0.0  # fixed
    low: float = 0.0  # uniform bounds / exponential truncation
    high: float = 0.0
    mean: float = 0.0  # exponential mean before truncation
    values: tuple[float, ...] = ()  # list
    shuffled: bool = True  # list: draw without replacement (True) or cycle in order

    @staticmethod
    def fixed(seconds: float) -> Duration:
        return Duration("fixed", value=seconds)


@dataclass(frozen=True, slots=True)
class OutputActions:
    activate: tuple[str, ...] = ()
    deactivate: tuple[str, ...] = ()
    pulse: tuple[str, ...] = ()

    def __bool__(self) -> bool:
        return bool(self.activate or self.deactivate or self.pulse)


@dataclass(frozen=True, slots=True)
class Schedule:
    """A reinforcement schedule on one input (Ferster & Skinner 1957)."""

    input: str
    kind: str  # FR | VR | RR | FI | VI
    value: float  # ratio n, probability p (RR) or interval seconds
    intervals: int = 12  # VI: length of the Fleshler–Hoffman list
    on_met: str = END_TRIAL  # the step once the requirement is met


@dataclass(frozen=True, slots=True)
class Step:
    name: str
    on_enter: OutputActions = OutputActions()
    on_leave: OutputActions = OutputActions()
    wait: Duration | None = None  # None: no timeout (the session limit still applies)
    next: str = END_TRIAL  # target when the wait runs out
    respond: dict[str, str] = field(default_factory=dict)  # input -> target
    choose: tuple[str, ...] = ()  # option labels offered
    if_rewarded: str = END_TRIAL
    if_unrewarded: str = END_TRIAL
    schedule: Schedule | None = None
    draw: tuple[tuple[str, float], ...] = ()  # (target, probability), taken on entry
    to_state: dict[str, str] = field(default_factory=dict)  # two-stage: state -> step, after a first choice

    @property
    def awaits_response(self) -> bool:
        return bool(self.respond or self.choose)


@dataclass(frozen=True, slots=True)
class TrialType:
    name: str
    steps: tuple[Step, ...]

    def step_index(self, name: str) -> int:
        for i, step in enumerate(self.steps):
            if step.name == name:
                return i
        raise KeyError(name)


@dataclass(frozen=True, slots=True)
class Option:
    label: str
    input: str
    # None for a first-stage option of a two-stage task: its outcome is decided in the state
    # it leads to, by that state's options.
    reward_probability: float | None


@dataclass(frozen=True, slots=True)
class BlockEnd:
    """A block ends when the first of its set conditions holds (checked after each trial)."""

    trials: int | None = None
    minutes: float | None = None
    rewards: int | None = None
    streak: int | None = None  # consecutive correct choices
    accuracy: float | None = None  # fraction correct over the last `window` choice trials
    window: int | None = None

    def __bool__(self) -> bool:
        return any(v is not None for v in (self.trials, self.minutes, self.rewards, self.streak, self.accuracy))


@dataclass(frozen=True, slots=True)
class Block:
    name: str
    mix: tuple[tuple[str, float], ...]  # (trial type, weight)
    order: str = "shuffled"
    max_run: int | None = None
    until: BlockEnd = BlockEnd()
    next: str | None = None  # None: the following block, or end of session after the last
    reward_probability: dict[str, float] = field(default_factory=dict)  # overrides per option
    swap: tuple[tuple[str, str], ...] = ()  # reversal: exchange these options' contingencies
    withhold_outcomes: bool = False  # extinction / probe: no pellet, no reward
    iti: Duration | None = None  # overrides the protocol's ITI


# Learning models the estimator offers, and the parameters a rule can read (name.mean ...).
# server.models declares the same names; a conformance test keeps the two in step.
ESTIMATOR_MODELS = ("q_learning", "q_dual_rate", "q_sticky", "q_forgetting")
ESTIMATE_PARAMETERS = ("alpha", "beta", "alpha_pos", "alpha_neg", "kappa", "decay")
ACTION_KINDS = ("switch_block", "reverse", "probe", "set_iti", "scale_iti", "end_session", "alarm", "note")
# Actions that change the schedule: at most one rule doing these fires after a trial.
SCHEDULE_ACTIONS = ("switch_block", "reverse", "probe", "end_session")


@dataclass(frozen=True, slots=True)
class EstimatorSpec:
    model: str = "q_learning"
    drift: float = 0.0  # random-walk step of log beta between trials (0: static)


@dataclass(frozen=True, slots=True)
class RuleAction:
    kind: str  # one of ACTION_KINDS
    block: str | None = None  # switch_block; probe: where to go after (None: end session)
    options: tuple[str, str] | None = None  # reverse
    minutes: float | None = None  # probe length
    seconds: float | None = None  # set_iti
    factor: float | None = None  # scale_iti
    message: str | None = None  # end_session reason / alarm text


@dataclass(frozen=True, slots=True)
class Rule:
    name: str
    text: str  # the condition as written
    condition: Node
    reads: tuple[Quantity, ...]
    actions: tuple[RuleAction, ...]
    hold_for: int = 1  # consecutive trial evaluations the condition must hold (hysteresis)
    cooldown: int = 0  # trials after a firing during which the rule cannot fire again
    max_firings: int | None = None


@dataclass(frozen=True, slots=True)
class Pavlovian:
    """Which step is the CS and which inputs count as lever and magazine, for the PCA index."""

    cs_step: str
    lever: str
    magazine: str
    cs_seconds: float


@dataclass(frozen=True, slots=True)
class Limits:
    max_minutes: float | None = None
    max_rewards: int | None = None
    max_trials: int | None = None


@dataclass(frozen=True, slots=True)
class RewardWalk:
    """A bounded Gaussian random walk of each second-stage reward probability, one step per
    trial, reflected at the bounds (drawn from the session's seeded generator)."""

    sd: float
    low: float = 0.0
    high: float = 1.0


@dataclass(frozen=True, slots=True)
class SecondState:
    """One second-stage state of a two-stage trial: the options it offers, whose reward
    probabilities decide the outcome. One option is a single response (no second choice)."""

    name: str
    options: tuple[str, ...]  # second-stage option labels (of `Protocol.options`)

    @property
    def offers_choice(self) -> bool:
        return len(self.options) > 1


@dataclass(frozen=True, slots=True)
class TwoStage:
    """The structure of a two-stage task: a first choice leads, by a declared transition
    probability, to one of the second-stage states, where the outcome is decided."""

    first: tuple[str, ...]  # first-stage option labels
    states: dict[str, SecondState]
    transitions: dict[str, dict[str, float]]  # first option -> state -> probability (sum 1)
    walk: RewardWalk | None = None

    def common_state(self, first: str) -> str:
        """The state a first-stage option most often leads to (its common transition)."""
        row = self.transitions[first]
        return max(row, key=lambda state: (row[state], state))

    def state_of(self, option: str) -> str | None:
        """The second-stage state offering `option`, if any."""
        for state in self.states.values():
            if option in state.options:
                return state.name
        return None

    def expected_reward(self, first: str, p: dict[str, float]) -> float:
        """P(reward) after choosing `first` and then the best option of the state reached,
        under reward probabilities `p` (what a model-based learner maximises)."""
        return sum(q * max(p[o] for o in self.states[s].options) for s, q in self.transitions[first].items())


@dataclass(frozen=True, slots=True)
class Protocol:
    name: str
    source: str  # file path it was loaded from
    sha256: str  # of the file's bytes, stored with each session
    wiring: Wiring
    options: dict[str, Option]
    trial_types: dict[str, TrialType]
    blocks: tuple[Block, ...]
    iti: Duration
    limits: Limits
    at_start: OutputActions = OutputActions()
    description: str = ""
    estimator: EstimatorSpec | None = None
    rules: tuple[Rule, ...] = ()
    iti_bounds: tuple[float, float] | None = None  # rules may set/scale the ITI within these
    pavlovian: Pavlovian | None = None
    settings: dict[str, float] = field(default_factory=dict)  # named numbers rules may read
    two_stage: TwoStage | None = None
    warnings: tuple[Problem, ...] = ()  # old spellings read, each naming its new one

    def block(self, name: str) -> Block:
        for b in self.blocks:
            if b.name == name:
                return b
        raise KeyError(name)

    def option_for_input(self, input_name: str) -> str | None:
        for option in self.options.values():
            if option.input == input_name:
                return option.label
        return None
