"""What every virtual animal shares: binding to a box, and the trips to the magazine.

An agent is event-driven and keeps no clock: the box tells it what changed (an input
presented or withdrawn, a pellet dropping) and wakes it at times it asked for; when awake
it acts through the box (`press`, `enter`, `enter_magazine`). Deciding at the moment of
acting, not in advance, means a lever extended a moment later is still a candidate.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from types import MappingProxyType
from typing import TYPE_CHECKING, ClassVar, Protocol

from hardware_stubs.agents.options import AgentError, AgentOption, resolve_options
from server.protocol.wiring import InputLine

if TYPE_CHECKING:
    from hardware_stubs.agents.draws import Draws
    from hardware_stubs.emulated_box import EmulatedBox


class Agent(Protocol):
    """The box's view of a virtual animal."""

    name: ClassVar[str]

    def learned_state(self) -> dict[str, object]:
        """What the animal carries to its next session (a new agent per session restores it)."""
        return {}

    def restore(self, state: Mapping[str, object]) -> None:
        pass

    def attach(self, box: EmulatedBox) -> None: ...
    def on_presented(self, t: float, line: InputLine, presented: bool) -> None: ...
    def on_pellet(self, t: float) -> None: ...
    def on_wake(self, t: float, token: int) -> None: ...


# Wake-up tokens of the base class; subclasses use 10 and up.
COLLECT = 1
CHECK = 2

MAGAZINE_OPTIONS = (
    AgentOption("collect_s", 0.8, "median latency to the magazine after a pellet drops (lognormal)", 0.05, 60.0),
    AgentOption("collect_sigma", 0.5, "log-scale spread of that latency", 0.0, 3.0),
    AgentOption("eat_s", 2.5, "median head-in time when eating", 0.1, 60.0),
    AgentOption("check_s", 0.8, "median head-in time when the magazine is empty", 0.05, 60.0),
    AgentOption("dwell_sigma", 0.4, "log-scale spread of head-in times", 0.0, 3.0),
    AgentOption("check_every_s", 60.0, "mean time between spontaneous magazine checks while idle (0: never)", 0.0, 1e6),
)


class VirtualAnimal:
    """Base of the built-in agents: options, magazine visits after pellets and when idle."""

    name: ClassVar[str] = ""
    summary: ClassVar[str] = ""
    OPTIONS: ClassVar[tuple[AgentOption, ...]] = MAGAZINE_OPTIONS
    # how a rehearsal cohort varies when the user declares nothing (`--vary` syntax): the
    # trait its protocols exist to measure, so that the estimates have something to track
    COHORT_VARY: ClassVar[tuple[str, ...]] = ()

    collect_s: float
    collect_sigma: float
    eat_s: float
    check_s: float
    dwell_sigma: float
    check_every_s: float

    def __init__(self, **options: object) -> None:
        values, errors = resolve_options(self.name, self.OPTIONS, options)
        if not errors:
            errors = self.cross_check(values)
        if errors:
            raise AgentError(errors)
        self.options: Mapping[str, object] = MappingProxyType(values)
        for key, value in values.items():
            setattr(self, key, value)
        self.box: EmulatedBox | None = None
        self.draws: Draws | None = None
        self._check: int | None = None
        self._collect: int | None = None
        self._busy_until = -math.inf

    @classmethod
    def cross_check(cls, values: Mapping[str, object]) -> list[str]:
        """Problems that involve several options at once (none by default)."""
        return []

    def learned_state(self) -> dict[str, object]:
        """What the animal carries to its next session (a new agent per session restores it)."""
        return {}

    def restore(self, state: Mapping[str, object]) -> None:
        pass

    def attach(self, box: EmulatedBox) -> None:
        if self.box is not None:
            raise ValueError(f"agent {self.name!r} already lives in a box")
        self.box = box
        self.draws = box.draws
        self._start_checks(box.now)

    # ------------------------------------------------------------ events from the box

    def on_presented(self, t: float, line: InputLine, presented: bool) -> None:
        pass

    def on_pellet(self, t: float) -> None:
        """The feeder clicked: go and collect, unless already on the way."""
        if self._collect is None:
            self._collect = self.box.wake(t + self.draws.lognormal(self.collect_s, self.collect_sigma), COLLECT)

    def on_wake(self, t: float, token: int) -> None:
        if token == COLLECT:
            self._collect = None
            self._visit_magazine(t)
        elif token == CHECK:
            self._check = None
            self._start_checks(t + self._visit_magazine(t))
        else:
            self._act(t, token)

    # ------------------------------------------------------------ for subclasses

    def _act(self, t: float, token: int) -> None:
        raise ValueError(f"agent {self.name!r} got an unknown wake-up token {token}")

    def _after_visit(self, t: float, dwell_s: float) -> None:
        pass

    def _visit_magazine(self, t: float) -> float:
        box = self.box
        median = self.eat_s if box.pellets_waiting else self.check_s
        dwell = self.draws.lognormal(median, self.dwell_sigma)
        box.enter_magazine(dwell)
        self._busy_until = t + dwell
        self._after_visit(t, dwell)
        return dwell

    def _start_checks(self, t: float) -> None:
        """Spontaneous checks come as a Poisson stream while idle (exponential gaps)."""
        if self._check is None and self.check_every_s > 0:
            self._check = self.box.wake(t + self.draws.exponential(self.check_every_s), CHECK)

    def _stop_checks(self) -> None:
        # Dropping the pending check and drawing a fresh gap later is fair for a
        # memoryless (exponential) stream.
        if self._check is not None:
            self.box.cancel(self._check)
            self._check = None
