"""A box that replays a fixed list of input events and remembers every command it got.

Engine tests use it to feed exact sequences; it shares no code with the virtual animals.
"""

from __future__ import annotations

import math

from server.engine.records import InputEvent, PulseOutput, SetOutput


class ScriptedBox:
    def __init__(self, events: list[tuple[float, str]] = ()):
        self.script = sorted(events)
        self.i = 0
        self.commands: list[tuple[float, SetOutput | PulseOutput]] = []
        self.active: set[str] = set()

    def apply(self, command, t: float) -> None:
        self.commands.append((t, command))
        if isinstance(command, SetOutput):
            (self.active.add if command.active else self.active.discard)(command.name)

    def next_time(self) -> float:
        return self.script[self.i][0] if self.i < len(self.script) else math.inf

    def pop_due(self, t: float):
        out = []
        while self.i < len(self.script) and self.script[self.i][0] <= t:
            at, name = self.script[self.i]
            out.append((at, InputEvent(name)))
            self.i += 1
        return out

    def pulses(self, name: str) -> list[float]:
        return [t for t, c in self.commands if isinstance(c, PulseOutput) and c.name == name]

    def switched(self, name: str, active: bool) -> list[float]:
        return [t for t, c in self.commands if isinstance(c, SetOutput) and c.name == name and c.active == active]
