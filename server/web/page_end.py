"""The page's end of the channel to the lab: the latest tile feed, and controls sent to the lab.

The page never holds the lab's objects; it knows the boxes only through the feed. Times in a
feed are the lab's session seconds at the moment it was sent. The page adds the time since it
*received* the feed, on its own monotonic clock: the two processes then share no clock at
all (a monotonic clock's origin is not promised to be shared between processes, and a wall
clock can be stepped by NTP between a send and a render). The cost is the channel's transit
time, well under a millisecond while the page reads its socket, against tiles shown to the
second; and a lab with nothing new to say sends nothing, while the page's clocks keep ticking.
"""

from __future__ import annotations

import asyncio
import itertools
import time
from collections.abc import Callable
from typing import Any

from server.lab.page_channel import LINE_LIMIT, ChannelError, decode, encode
from server.lab.status import BoxFacts
from server.web.tiles import tile_from_facts

ANSWER_TIMEOUT_S = 5.0


class LabGone(Exception):
    """The lab did not answer (503 for the client)."""


class LatestFeed:
    def __init__(self, clock: Callable[[], float] = time.monotonic):
        self.clock = clock
        self.t = 0.0  # the lab's session clock when the feed was sent
        self.boxes: list[BoxFacts] = []  # as the lab sent them (JSON)
        self.received_at: float | None = None
        self.store: str | None = None  # the lab's store line, with a lab-wide store

    def take(self, feed: dict[str, Any]) -> None:
        self.received_at = self.clock()
        self.t = float(feed["t"])
        self.boxes = list(feed["boxes"])
        store = feed.get("store")
        self.store = None if store is None else str(store)

    def tiles(self, quiet_after_s: float) -> list[dict[str, Any]]:
        aged = 0.0 if self.received_at is None else max(0.0, self.clock() - self.received_at)
        now = self.t + aged
        return [tile_from_facts(facts, now, quiet_after_s) for facts in self.boxes]

    def running_sessions(self) -> set[int]:
        return {facts["session_id"] for facts in self.boxes if not facts["finished"]}

    def paused_sessions(self) -> set[int]:
        """Sessions paused right now (the store hears of a pause up to a second later)."""
        return {facts["session_id"] for facts in self.boxes if facts["paused"] and not facts["finished"]}


class LabView:
    """What the page knows of the lab, kept current by `run()` until the lab's end closes."""

    def __init__(
        self,
        reader: asyncio.StreamReader,
        writer: asyncio.StreamWriter,
        *,
        clock: Callable[[], float] = time.monotonic,
        answer_timeout_s: float = ANSWER_TIMEOUT_S,
    ):
        self.reader = reader
        self.writer = writer
        self.latest = LatestFeed(clock)
        self.answer_timeout_s = answer_timeout_s
        self.closed = asyncio.Event()
        self._asked: dict[int, asyncio.Future] = {}
        self._ids = itertools.count(1)

    async def run(self) -> None:
        try:
            while True:
                try:
                    line = await self.reader.readline()
                except (ValueError, ConnectionError):
                    break
                if not line:
                    break
                try:
                    message = decode(line)
                except ChannelError:
                    continue
                if "feed" in message:
                    self.latest.take(message["feed"])
                elif "answer" in message:
                    waiting = self._asked.pop(message["answer"], None)
                    if waiting is not None and not waiting.done():
                        waiting.set_result(message)
        finally:
            self.closed.set()
            for waiting in self._asked.values():
                if not waiting.done():
                    waiting.set_exception(LabGone("the lab has closed its end; it is shutting down"))
            self._asked.clear()

    def tell_ready(self, pid: int) -> None:
        self._send({"ready": pid})

    async def ask(self, op: str, session_id: int, origin: str, text: str | None = None) -> dict[str, Any]:
        """Ask the lab to pause, resume, stop or annotate; its answer (with "status").

        Raises `LabGone` when the lab has gone or does not answer in time.
        """
        if self.closed.is_set():
            raise LabGone("the lab has closed its end; it is shutting down")
        ask_id = next(self._ids)
        waiting = asyncio.get_running_loop().create_future()
        self._asked[ask_id] = waiting
        self._send({"ask": ask_id, "op": op, "session_id": session_id, "origin": origin, "text": text})
        try:
            return await asyncio.wait_for(waiting, self.answer_timeout_s)
        except TimeoutError:
            raise LabGone(
                f"the lab did not answer within {self.answer_timeout_s:g} s; "
                "the action may still happen: check the session before repeating it"
            ) from None
        finally:
            self._asked.pop(ask_id, None)

    def _send(self, message: dict[str, Any]) -> None:
        if not self.writer.is_closing():
            self.writer.write(encode(message))


async def open_lab_view(sock, **kw: Any) -> LabView:
    """The page's end over a connected stream socket (its half of a socketpair)."""
    reader, writer = await asyncio.open_unix_connection(sock=sock, limit=LINE_LIMIT)
    return LabView(reader, writer, **kw)
