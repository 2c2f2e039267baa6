"""What the session core and its live driver need of the layers around them.

Small typed Protocols, declared here because the engine is the layer that uses them: the
models, the rules and the box links implement them without importing each other, and the
lab puts them together (server/lab/assembly.py, server/lab/supervisor.py).

The closed loop after a trial is a pipeline the session runs: the finished trial goes to the
estimator, then to the rules; the rules only read the session (`SessionView`) and hand back
`RuleDecision`s, data that the session carries out itself.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass
from typing import Any, Literal, Protocol, overload

from server.engine.block_progress import BlockProgress
from server.engine.records import Command, EventLogged, InputEvent, SecondStage, TrialOutcome
from server.protocol.model import Protocol as TaskProtocol
from server.protocol.model import RuleAction

# ---------------------------------------------------------------- the learning-model estimator


class ParameterSummary(Protocol):
    """One parameter's posterior: mean and 95 % interval."""

    @property
    def mean(self) -> float: ...
    @property
    def low(self) -> float: ...
    @property
    def high(self) -> float: ...


class EstimateSummary(Protocol):
    """The estimator's view after a trial; rules read its fields by name."""

    @property
    def model(self) -> str: ...
    @property
    def params(self) -> Mapping[str, ParameterSummary]: ...
    def to_dict(self) -> dict[str, Any]: ...


class TrialEstimator(Protocol):
    """An online estimator as the session sees it: fed each choice trial, asked for a summary."""

    @property
    def model_name(self) -> str: ...

    @overload
    def update(
        self,
        choice: str | None,
        reward: float,
        *,
        second: SecondStage | None = ...,
        summarise: Literal[True] = ...,
    ) -> EstimateSummary: ...
    @overload
    def update(
        self, choice: str | None, reward: float, *, second: SecondStage | None = ..., summarise: bool
    ) -> EstimateSummary | None: ...
    def update(
        self, choice: str | None, reward: float, *, second: SecondStage | None = None, summarise: bool = True
    ) -> EstimateSummary | None:
        """Learn from one choice trial (`choice` is the first-stage choice of a two-stage trial,
        `second` what followed it); the summary costs more than the update, so a caller that
        does not need it at once (rehearsal) asks for it later with `estimate`."""
        ...

    def estimate(self) -> EstimateSummary: ...
    def p_choice_at_least(self, label: str, level: float) -> float | None: ...
    def state_dict(self) -> dict[str, Any]: ...


# ---------------------------------------------------------------- the rules


class SessionView(Protocol):
    """What rules may read of a session; they change it only through their decisions."""

    @property
    def protocol(self) -> TaskProtocol: ...
    @property
    def finished(self) -> bool: ...
    @property
    def rewards(self) -> int: ...
    @property
    def trials_done(self) -> int: ...
    @property
    def reversals(self) -> int: ...
    @property
    def block(self) -> BlockProgress | None: ...
    @property
    def in_probe(self) -> bool: ...
    @property
    def estimator(self) -> TrialEstimator | None: ...
    @property
    def estimate(self) -> EstimateSummary | None: ...
    def best_options(self) -> frozenset[str]: ...


@dataclass(frozen=True, slots=True)
class RuleDecision:
    """A rule that fired after a trial: the actions for the session to carry out and every
    value its condition read (kept in the firing record)."""

    rule: str
    actions: tuple[RuleAction, ...]
    values: dict[str, float | None]
    changes_schedule: bool  # reverses, switches blocks, starts a probe or ends the session


class TrialRules(Protocol):
    def after_trial(self, trial: TrialOutcome, session: SessionView) -> Iterator[RuleDecision]:
        """The decisions after `trial`, one at a time: the session carries out each before
        asking for the next, so a later rule reads the session as the earlier one left it."""
        ...

    def firings(self) -> dict[str, int]:
        """How often each rule has fired so far, every rule named, in the protocol's order."""
        ...


# ---------------------------------------------------------------- the box link


class LinkSubscriber(Protocol):
    """What a box link may ask of the session it serves (the live driver answers)."""

    def input(self, event: InputEvent, t: float) -> None:
        """An accepted input edge at session time t."""
        ...

    def record(self, record: EventLogged) -> None:
        """Something the link saw (a loss, a restart, an edge it could not deliver in time),
        for the session's record stream."""
        ...

    def cut_trial(self, reason: str) -> None:
        """The box was unreachable during the trial in progress: store it as interrupted."""
        ...

    def expected_outputs(self) -> Iterable[str]:
        """Held outputs the session has on now (driven again when a lost link returns)."""
        ...

    def trial_index(self) -> int: ...


class BoxLink(Protocol):
    """One box as the lab and the live driver see it, whatever carries it (serial, emulator)."""

    @property
    def connected(self) -> bool: ...

    async def connect(self) -> object:
        """Reach the box and check it before any session starts (raises LinkError)."""
        ...

    async def run(self) -> None:
        """Serve the link for as long as the session lasts."""
        ...

    def attach(self, subscriber: LinkSubscriber) -> None: ...
    def send(self, commands: list[Command]) -> None: ...

    async def close(self) -> bool:
        """Deliver what is pending, then let go of the box; True when nothing was left."""
        ...
