"""Live driver: runs one session against a box link on the asyncio loop's monotonic clock.

The link owns the box (serial or in-process emulator). It pushes `(InputEvent, t)` pairs
onto `events` with t already in session seconds, and accepts commands through `send`. The
driver only decides *when* to call the core: at each input, and at each deadline.
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable
from typing import Protocol as TypingProtocol

from server.engine.records import Command, InputEvent, Record
from server.engine.session import Session


class BoxLink(TypingProtocol):
    events: asyncio.Queue[tuple[InputEvent, float] | ControlRequest]

    def send(self, commands: list[Command]) -> None: ...


class ControlRequest:
    """Queued to wake the driver when the session is told something from outside:
    `stop` (argument: the end reason), `pause` or `resume` (argument: who asked)."""

    __slots__ = ("action", "argument")

    def __init__(self, action: str, argument: str):
        if action not in ("stop", "pause", "resume"):
            raise ValueError(f"unknown control action '{action}'")
        self.action = action
        self.argument = argument


class LiveSession:
    def __init__(
        self,
        session: Session,
        link: BoxLink,
        clock: Callable[[], float],
        publish: Callable[[list[Record]], None],
    ):
        self.session = session
        self.link = link
        self.clock = clock  # seconds since session start
        self.publish = publish
        self._last_t = 0.0

    def request_stop(self, reason: str) -> None:
        self.link.events.put_nowait(ControlRequest("stop", reason))

    def request(self, action: str, argument: str) -> None:
        self.link.events.put_nowait(ControlRequest(action, argument))

    def _send(self, commands: list[Command]) -> None:
        if commands:
            self.link.send(commands)
        records = self.session.take_records()
        if records:
            self.publish(records)

    def _t(self, t: float) -> float:
        # The core needs non-decreasing times; a device stamp can trail a deadline we ran.
        self._last_t = max(self._last_t, t)
        return self._last_t

    async def run(self) -> None:
        session = self.session
        queue = self.link.events
        try:
            self._send(session.start(self._t(self.clock())))
            while not session.finished:
                delay = session.next_deadline - self.clock()
                if delay > 0:
                    try:
                        async with asyncio.timeout(delay):
                            item = await queue.get()
                    except TimeoutError:
                        self._send(session.advance(self._t(self.clock())))
                        continue
                    self._handle(item)
                    while not queue.empty() and not session.finished:
                        self._handle(queue.get_nowait())
                else:
                    self._send(session.advance(self._t(self.clock())))
        except asyncio.CancelledError:
            self._send(session.stop(self._t(self.clock()), "stopped: program shutting down"))
            raise
        except Exception as exc:  # a bug must still leave the box safe and the session closed
            self._send(session.stop(self._t(self.clock()), f"error: {type(exc).__name__}: {exc}"))
            raise

    def _handle(self, item: tuple[InputEvent, float] | ControlRequest) -> None:
        if isinstance(item, ControlRequest):
            t = self._t(self.clock())
            if item.action == "stop":
                self._send(self.session.stop(t, item.argument))
            elif item.action == "pause":
                self._send(self.session.pause(t, item.argument))
            else:
                self._send(self.session.resume(t, item.argument))
            return
        event, t = item
        self._send(self.session.feed(event, self._t(t)))
