"""A box link to an emulated box living in the same process, in real time.

Used by tests and as a fallback when no serial path is wanted; the emulated box is the same
object the virtual-time rehearsal uses, only paced by the asyncio clock.
"""

from __future__ import annotations

import asyncio
import math
from collections.abc import Callable

from server.engine.records import Command
from server.engine.seams import LinkSubscriber
from server.engine.virtual import VirtualBox


class InProcessLink:
    """A `BoxLink` (server/engine/seams.py) to an emulated box; it never loses its link."""

    def __init__(self, box: VirtualBox, clock: Callable[[], float]):
        self.box = box
        self.clock = clock
        self._wake = asyncio.Event()
        self._session: LinkSubscriber | None = None
        self.connected = True  # nothing to lose (a test may pretend otherwise)

    async def connect(self) -> None:
        """Nothing to reach: the box is here."""

    def attach(self, subscriber: LinkSubscriber) -> None:
        self._session = subscriber

    def send(self, commands: list[Command]) -> None:
        t = self.clock()
        for command in commands:
            self.box.apply(command, t)
        self._wake.set()  # the animal may now plan something sooner

    async def run(self) -> None:
        loop = asyncio.get_running_loop()
        while True:
            delay = self.box.next_time() - self.clock()
            if delay > 0:
                self._wake.clear()
                timer = None if math.isinf(delay) else loop.call_later(delay, self._wake.set)
                try:
                    await self._wake.wait()
                finally:
                    if timer is not None:
                        timer.cancel()
                continue
            for t, event in self.box.pop_due(self.clock()):
                if self._session is not None:
                    self._session.input(event, t)

    async def close(self) -> bool:
        return True
