"""An operant box in-process: output commands in, input edges out, a virtual animal inside.

Sans-I/O like the session core: time is passed in, nothing sleeps or reads a clock, and all
randomness comes from the Generator given at construction. The same object serves the
virtual-time rehearsal, the real-time demo and the serial-device emulator.

Physics kept here (the animal decides, the box enforces what is physically possible):
- held outputs are active or inactive; an input is presented while the output named by its
  `presented_by` is active, or always when it has none;
- a press or poke is only possible on a presented input; its switch releases 0.1-0.3 s later;
- a feeder pulse drops one pellet into the magazine; a head entry eats every pellet there;
- head entries and licks give a rising edge and, after the dwell, a falling edge;
- a pellet sensor, when wired, is high while pellets wait in the magazine.
"""

from __future__ import annotations

import math
from heapq import heappop, heappush
from typing import TYPE_CHECKING

import numpy as np

from hardware_stubs.agents.draws import Draws
from server.engine.records import InputEvent, PulseOutput, SetOutput
from server.protocol.wiring import OPERANT_INPUT_KINDS, InputLine, Wiring

if TYPE_CHECKING:
    from hardware_stubs.agents.base import Agent

# Queue entries are (time, seq, code, payload); seq breaks ties first-in first-out.
_EDGE = 0  # payload: InputEvent to hand out
_WAKE = 1  # payload: the agent's token
_SWITCH_RELEASE_S = (0.1, 0.3)  # lever / poke switch held closed this long (common practice)

# What an output is, looked up once per command: held, a feeder, or another pulsed output.
_HELD = 0
_FEEDER = 1
_PULSED = 2


class EmulatedBox:
    """One box with one virtual animal; see the module docstring for the physics."""

    def __init__(self, wiring: Wiring, agent: Agent, rng: np.random.Generator) -> None:
        self.wiring = wiring
        self.draws = Draws(rng)
        self._agent = agent
        self._now = 0.0
        self._queue: list[tuple[float, int, int, object]] = []
        self._seq = 0
        self._cancelled: set[int] = set()

        self._active = {o.name: False for o in wiring.outputs.values() if not o.pulsed}
        self._output_kind = {
            o.name: _HELD if not o.pulsed else _FEEDER if o.kind == "feeder" else _PULSED
            for o in wiring.outputs.values()
        }
        presents: dict[str, list[InputLine]] = {}
        for line in wiring.inputs.values():
            by = line.presented_by
            if by is None:
                continue
            if by not in self._active:
                raise ValueError(f"input {line.name!r} is presented by unknown held output {by!r}")
            presents.setdefault(by, []).append(line)
        self._presents = {k: tuple(v) for k, v in presents.items()}
        self._presented = {i.name: i.presented_by is None for i in wiring.inputs.values()}
        self._operants = tuple(i.name for i in wiring.inputs.values() if i.kind in OPERANT_INPUT_KINDS)
        self.presented_operants = tuple(filter(self._presented.__getitem__, self._operants))

        # Events carry no per-edge data here, so one frozen instance per edge serves all.
        self._rise = {n: InputEvent(n, True) for n in wiring.inputs}
        self._fall = {n: InputEvent(n, False) for n in wiring.inputs}
        self._down_until = dict.fromkeys(wiring.inputs, -math.inf)
        heads = wiring.inputs_of_kind("head_entry")
        sensors = wiring.inputs_of_kind("pellet_sensor")
        self.magazine: str | None = heads[0].name if heads else None
        self._sensor: str | None = sensors[0].name if sensors else None
        self._head_until = -math.inf

        self._waiting = 0
        self._delivered = 0
        self._eaten = 0
        agent.attach(self)

    # ------------------------------------------------------------ driver side

    def apply(self, command: SetOutput | PulseOutput, t: float) -> None:
        """Carry out an output command at time `t`."""
        if t > self._now:
            self._now = t
        name = command.name
        kind = self._output_kind.get(name)
        if kind is None:
            raise ValueError(f"unknown output {name!r}")
        if type(command) is PulseOutput:
            if kind == _HELD:
                raise ValueError(f"output {name!r} is held, not pulsed")
            if kind == _FEEDER:
                self._drop_pellet()
            return
        if kind != _HELD:
            raise ValueError(f"output {name!r} is pulsed, not held")
        active = command.active
        if self._active[name] != active:  # _set_held, inline for lights and tones
            self._active[name] = active
            lines = self._presents.get(name)
            if lines:
                self._present(lines, active)

    def next_time(self) -> float:
        """Time of the earliest pending input event or agent action, math.inf if none.

        An agent action may come to nothing (say, the animal pauses), so popping at this
        time can return an empty list; the driver simply asks again.
        """
        queue, cancelled = self._queue, self._cancelled
        while queue:
            seq = queue[0][1]
            if seq not in cancelled:
                return queue[0][0]
            heappop(queue)
            cancelled.discard(seq)
        return math.inf

    def pop_due(self, t: float) -> list[tuple[float, InputEvent]]:
        """Every input event with time <= t, in time order (agent actions run on the way)."""
        queue, cancelled, agent = self._queue, self._cancelled, self._agent
        out: list[tuple[float, InputEvent]] = []
        while queue and queue[0][0] <= t:
            when, seq, code, payload = heappop(queue)
            if seq in cancelled:
                cancelled.discard(seq)
                continue
            if when > self._now:
                self._now = when
            if code == _EDGE:
                out.append((when, payload))  # type: ignore[arg-type]
            else:
                agent.on_wake(when, payload)  # type: ignore[arg-type]
        if t > self._now:
            self._now = t
        return out

    def safe_state(self) -> None:
        """Every held output inactive (levers retracted, lights and tone off)."""
        for name, active in self._active.items():
            if active:
                self._set_held(name, False)

    # ------------------------------------------------------------ read-only state

    @property
    def now(self) -> float:
        """Latest time the box has seen (from apply, pop_due or a due action)."""
        return self._now

    @property
    def active_outputs(self) -> frozenset[str]:
        return frozenset(n for n, a in self._active.items() if a)

    def is_active(self, output: str) -> bool:
        return self._active[output]

    def presented(self, input_name: str) -> bool:
        return self._presented[input_name]

    @property
    def pellets_waiting(self) -> int:
        """Pellets in the magazine, not yet eaten."""
        return self._waiting

    @property
    def pellets_delivered(self) -> int:
        return self._delivered

    @property
    def pellets_eaten(self) -> int:
        return self._eaten

    @property
    def head_in(self) -> bool:
        """The animal's head is in the magazine now."""
        return self._now < self._head_until

    @property
    def head_until(self) -> float:
        return self._head_until

    # ------------------------------------------------------------ agent side

    def wake(self, at: float, token: int) -> int:
        """Call the agent's on_wake(at, token) when time reaches `at`; returns a handle."""
        self._seq += 1
        heappush(self._queue, (at if at > self._now else self._now, self._seq, _WAKE, token))
        return self._seq

    def cancel(self, handle: int) -> None:
        """Forget a pending wake-up (it must not have run yet)."""
        self._cancelled.add(handle)

    def press(self, input_name: str) -> bool:
        """Press a lever or poke a port now; False if it is not presented or still held down."""
        if not self._presented[input_name]:
            return False
        now = self._now
        if now < self._down_until[input_name]:
            return False
        release = now + self.draws.between(*_SWITCH_RELEASE_S)
        self._down_until[input_name] = release
        self._edge(now, self._rise[input_name])
        self._edge(release, self._fall[input_name])
        return True

    def enter(self, input_name: str, dwell_s: float) -> bool:
        """Break a dwell beam (lick spout, magazine) now for `dwell_s`; False if already in."""
        if input_name == self.magazine:
            entering = self._now >= self._head_until
            self.enter_magazine(dwell_s)
            return entering
        return self._beam(input_name, dwell_s)

    def enter_magazine(self, dwell_s: float) -> int:
        """Head into the magazine for `dwell_s` (unless already in); returns pellets eaten."""
        now = self._now
        if now >= self._head_until:
            self._head_until = now + dwell_s
            if self.magazine is not None:
                self._beam(self.magazine, dwell_s)
        eaten = self._waiting
        if eaten:
            self._waiting = 0
            self._eaten += eaten
            if self._sensor is not None:
                self._edge(now, self._fall[self._sensor])
        return eaten

    # ------------------------------------------------------------ internals

    def _beam(self, input_name: str, dwell_s: float) -> bool:
        now = self._now
        if now < self._down_until[input_name]:
            return False
        self._down_until[input_name] = now + dwell_s
        self._edge(now, self._rise[input_name])
        self._edge(now + dwell_s, self._fall[input_name])
        return True

    def _edge(self, at: float, event: InputEvent) -> None:
        self._seq += 1
        heappush(self._queue, (at, self._seq, _EDGE, event))

    def _set_held(self, name: str, active: bool) -> None:
        self._active[name] = active
        lines = self._presents.get(name)
        if lines:
            self._present(lines, active)

    def _present(self, lines: tuple[InputLine, ...], presented: bool) -> None:
        """Inputs made available (or withdrawn) by one held output; then the animal hears of it."""
        now_presented = self._presented
        for line in lines:
            now_presented[line.name] = presented
        self.presented_operants = tuple(filter(now_presented.__getitem__, self._operants))
        on_presented, now = self._agent.on_presented, self._now
        for line in lines:
            on_presented(now, line, presented)

    def _drop_pellet(self) -> None:
        self._delivered += 1
        self._waiting += 1
        if self._waiting == 1 and self._sensor is not None:
            self._edge(self._now, self._rise[self._sensor])
        self._agent.on_pellet(self._now)
