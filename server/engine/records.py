"""What flows in and out of the session core.

The core is fed `InputEvent`s and returns `Command`s for the box and `Record`s for its
subscribers (store, estimator, status page). All times are seconds from session start,
as floats; device times travel alongside untouched so the store can keep both.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

# ---------------------------------------------------------------- box side


@dataclass(frozen=True, slots=True)
class InputEvent:
    """An input edge seen by the box: `rising` True for onset (press, head entry)."""

    name: str  # logical input name from the protocol's wiring
    rising: bool = True
    device_t_us: int | None = None  # raw device clock (wraps at 2**32), when known
    device_seq: int | None = None  # device sequence number, when it came over a wire


@dataclass(frozen=True, slots=True)
class SetOutput:
    """Drive a held output (lever extended, light on, tone on) active or inactive."""

    name: str
    channel: int
    active: bool


@dataclass(frozen=True, slots=True)
class PulseOutput:
    """A timed pulse generated on the device (feeder, sync); the host never times it."""

    name: str
    channel: int
    ms: int


Command = SetOutput | PulseOutput


class ControlAction(StrEnum):
    """What an operator can tell a running session from outside its protocol."""

    PAUSE = "pause"
    RESUME = "resume"
    STOP = "stop"


# ---------------------------------------------------------------- record stream


@dataclass(frozen=True, slots=True)
class SessionStarted:
    t: float
    protocol: str
    seed: int
    first_block: str


@dataclass(frozen=True, slots=True)
class EventLogged:
    """Anything worth keeping in the events table, in time order.

    `kind` is one of: input, output, pulse, applied (an output command as the device
    acknowledged it, with the device's time), step, block, note, link_lost, link_restored,
    cap, alarm. `name` is the input/output/step/block it concerns.
    """

    t: float
    kind: str
    name: str
    value: float | None = None
    device_t_us: int | None = None
    device_seq: int | None = None
    detail: dict[str, Any] | None = None


@dataclass(frozen=True, slots=True)
class SecondStage:
    """Where a two-stage trial's first choice led, and what the animal did there.

    `choice` is the second-stage option chosen; None where the state offers a single response
    (then `response` names it) or the animal did not respond there (`omitted`).
    """

    state: str  # the second-stage state reached
    common: bool  # reached through the first choice's common transition
    choice: str | None = None
    response: str | None = None  # the input that answered in the second stage, if any
    latency_s: float | None = None  # from the state's lights on to that response
    omitted: bool = False  # the second-stage window ran out


@dataclass(frozen=True, slots=True)
class TrialOutcome:
    """A trial as the closed loop judges it when it ends: everything the store keeps of it
    but the ITI that follows, which the estimator and rules have yet to decide.

    The session builds it and its `TrialRecord` from the same positional fields
    (Session._end_trial): a new field goes in both, at the same place.
    """

    trial: int
    block: str
    block_index: int
    trial_type: str
    t_start: float
    t_end: float
    choice: str | None
    response: str | None
    latency_s: float | None
    rewarded: bool
    reward: float
    correct: bool | None
    omission: bool
    interrupted: bool
    steps: tuple[tuple[str, float], ...] = ()
    counts: dict[str, int] = field(default_factory=dict)
    first_s: dict[str, float] = field(default_factory=dict)
    extra: dict[str, Any] = field(default_factory=dict)
    second: SecondStage | None = None  # two-stage trials only


@dataclass(frozen=True, slots=True)
class TrialRecord:
    """One finished trial as stored, with the ITI the closed loop chose after it; committed
    by the store as soon as it is emitted. Built once, after the closed loop ran, from the
    same positional fields as its `TrialOutcome` (Session._end_trial)."""

    trial: int  # 1-based within the session
    block: str
    block_index: int  # 1-based count of blocks entered so far
    trial_type: str
    t_start: float
    t_end: float
    choice: str | None  # option label, None when no choice was made
    response: str | None  # input that ended the response window, if any
    latency_s: float | None
    rewarded: bool
    reward: float  # pellets delivered in this trial (0 when withheld or unrewarded)
    correct: bool | None  # chose a best option under the current contingencies
    omission: bool
    interrupted: bool
    iti_s: float  # intertrial interval that followed this trial
    steps: tuple[tuple[str, float], ...] = ()  # (step name, entry time)
    counts: dict[str, int] = field(default_factory=dict)  # responses per input in this trial
    first_s: dict[str, float] = field(default_factory=dict)  # first response latency per input
    extra: dict[str, Any] = field(default_factory=dict)
    second: SecondStage | None = None  # two-stage trials only: what happened after the first choice


@dataclass(frozen=True, slots=True)
class BlockStarted:
    t: float
    block: str
    block_index: int
    contingencies: dict[str, float]  # option label -> reward probability now in force
    outcomes_withheld: bool


@dataclass(frozen=True, slots=True)
class SessionEnded:
    t: float
    reason: str
    trials: int
    rewards: int


@dataclass(frozen=True, slots=True)
class EstimateUpdated:
    """The learning-model estimate after a trial (an object with `to_dict()`)."""

    trial: int
    model: str
    estimate: Any


@dataclass(frozen=True, slots=True)
class RuleFired:
    """A closed-loop rule fired after `trial`: what it did and every value its condition read."""

    t: float
    trial: int
    rule: str
    actions: tuple[dict[str, Any], ...]
    values: dict[str, float | None]


Record = SessionStarted | EventLogged | TrialRecord | BlockStarted | SessionEnded | EstimateUpdated | RuleFired
