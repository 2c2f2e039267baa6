"""Virtual-time driver: a discrete-event loop over one session and one emulated box.

The box (see hardware_stubs.emulated_box) is any object with `apply(command, t)`,
`next_time()` and `pop_due(t)`. Whichever of the session's deadline and the box's next
input comes first is processed; nothing sleeps, so a night runs in milliseconds.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Protocol as TypingProtocol

from server.engine.records import Command, InputEvent, Record
from server.engine.session import Session


class VirtualBox(TypingProtocol):
    def apply(self, command: Command, t: float) -> None: ...
    def next_time(self) -> float: ...
    def pop_due(self, t: float) -> list[tuple[float, InputEvent]]: ...


def run_virtual(
    session: Session,
    box: VirtualBox,
    on_records: Callable[[list[Record]], None] | None = None,
) -> Session:
    """Run the session to its end in virtual time; returns it for inspection."""
    t = 0.0
    apply, next_time, pop_due = box.apply, box.next_time, box.pop_due
    feed, advance = session.feed, session.advance
    for command in session.start(t):
        apply(command, t)
    while not session.finished:
        t_box = next_time()
        t_session = session.next_deadline
        if t_box <= t_session:
            for t, event in pop_due(t_box):
                for command in feed(event, t):
                    apply(command, t)
                if session.finished:
                    break
        else:
            if t_session == math.inf:  # cannot happen: the time limit is always finite
                session.stop(t, "error: nothing left to happen")
                break
            t = t_session
            for command in advance(t):
                apply(command, t)
        if on_records is not None:
            records = session.take_records()
            if records:
                on_records(records)
    if on_records is not None:
        records = session.take_records()
        if records:
            on_records(records)
    return session
