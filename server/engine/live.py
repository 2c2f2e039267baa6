"""Live driver: runs one session against a box link on the asyncio loop's monotonic clock.

The driver owns one queue, its inbox: the link puts accepted input edges there (through
`LinkSubscriber.input`, with t already in session seconds) and the lab puts operator
controls there (`request`). What the link sees besides inputs (a loss, a restart, an edge it
could not deliver in time) goes into the session's own record stream, so every record
reaches the store by one path. The driver only decides *when* to call the core: at each
input, at each control and at each deadline.
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable, Iterable

from server.engine.records import Command, ControlAction, EventLogged, InputEvent, Record
from server.engine.seams import BoxLink
from server.engine.session import Session


class ControlRequest:
    """Queued to wake the driver when the session is told something from outside:
    `stop` (argument: the end reason), `pause` or `resume` (argument: who asked)."""

    __slots__ = ("action", "argument")

    def __init__(self, action: ControlAction | str, argument: str):
        try:
            self.action = ControlAction(action)
        except ValueError:
            raise ValueError(f"unknown control action '{action}'") from None
        self.argument = argument


InboxItem = tuple[InputEvent, float] | ControlRequest


class LiveSession:
    """Drives `session` against `link`; also what the link may ask of the session."""

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
        self.inbox: asyncio.Queue[InboxItem] = asyncio.Queue()
        self._last_t = 0.0
        link.attach(self)

    # ------------------------------------------------------------ from the lab

    def request(self, action: ControlAction | str, argument: str) -> None:
        self.inbox.put_nowait(ControlRequest(action, argument))

    def request_stop(self, reason: str) -> None:
        self.request(ControlAction.STOP, reason)

    # ------------------------------------------------------------ from the link (LinkSubscriber)

    def input(self, event: InputEvent, t: float) -> None:
        if self.session.finished:
            # The box still reports after the end (a late press, the replay of a dropped
            # line): the core logs it and reacts to nothing, so it is stored all the same.
            self._handle((event, t))
            return
        self.inbox.put_nowait((event, t))

    def record(self, record: EventLogged) -> None:
        self.session.add_record(record)
        self._publish()

    def cut_trial(self, reason: str) -> None:
        self.session.mark_interrupted(reason)

    def expected_outputs(self) -> Iterable[str]:
        return self.session.active_outputs

    def trial_index(self) -> int:
        return self.session.trial_index

    # ------------------------------------------------------------ driving

    def _publish(self) -> None:
        records = self.session.take_records()
        if records:
            self.publish(records)

    def _send(self, commands: list[Command]) -> None:
        if commands:
            self.link.send(commands)
        self._publish()

    def _t(self, t: float) -> float:
        # The core needs non-decreasing times; a device stamp can trail a deadline we ran.
        self._last_t = max(self._last_t, t)
        return self._last_t

    async def run(self) -> None:
        session = self.session
        inbox = self.inbox
        try:
            self._send(session.start(self._t(self.clock())))
            while not session.finished:
                delay = session.next_deadline - self.clock()
                if delay > 0:
                    try:
                        async with asyncio.timeout(delay):
                            item = await inbox.get()
                    except TimeoutError:
                        self._send(session.advance(self._t(self.clock())))
                        continue
                    self._handle(item)
                    while not inbox.empty() and not session.finished:
                        self._handle(inbox.get_nowait())
                else:
                    self._send(session.advance(self._t(self.clock())))
        except asyncio.CancelledError:
            self._send(session.stop(self._t(self.clock()), "stopped: program shutting down"))
            raise
        except Exception as exc:  # a bug must still leave the box safe and the session closed
            self._send(session.stop(self._t(self.clock()), f"error: {type(exc).__name__}: {exc}"))
            raise
        finally:
            self._log_left_over()

    def _log_left_over(self) -> None:
        """Inputs still queued when the session ended are logged (not acted on): every event
        the box reported reaches the store."""
        while not self.inbox.empty():
            item = self.inbox.get_nowait()
            if not isinstance(item, ControlRequest) and self.session.finished:
                self._handle(item)

    def _handle(self, item: InboxItem) -> None:
        if isinstance(item, ControlRequest):
            t = self._t(self.clock())
            if item.action is ControlAction.STOP:
                self._send(self.session.stop(t, item.argument))
            elif item.action is ControlAction.PAUSE:
                self._send(self.session.pause(t, item.argument))
            else:
                self._send(self.session.resume(t, item.argument))
            return
        event, t = item
        self._send(self.session.feed(event, self._t(t)))
