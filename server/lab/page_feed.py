"""The lab's end of the channel to its status page: the tile feed out, operator controls in.

Runs on the lab's own loop, so it does little there: every `FEED_EVERY_S` it reads the
facts of the boxes whose sessions said something new and writes one line only when some
tile changed (bench/web.py prints what a turn costs); a control is applied with
`lab.control` / `lab.annotate` and answered at once.
A page that stops reading never holds the lab up: the feed is dropped while the socket's
buffer is full (only the latest feed matters), and a page that goes away ends only this.
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable, Sequence
from typing import Any, Protocol

from server.engine.records import ControlAction
from server.lab.page_channel import JSON, LINE_LIMIT, ChannelError, decode, encode
from server.lab.status import BoxFacts
from server.store.errors import StoreError

FEED_EVERY_S = 0.25
FEED_BACKLOG_BYTES = 1 << 20  # unsent feed beyond this: the page is not reading; skip a turn
NOTE_LIMIT = 2000


class FedRun(Protocol):
    """One box's run as the feed reads it (`server.lab.supervisor.BoxRun`)."""

    @property
    def session_id(self) -> int: ...
    @property
    def records_seen(self) -> int: ...
    @property
    def name(self) -> str: ...
    def facts(self) -> BoxFacts: ...


class FedLab(Protocol):
    """The lab as its end of the page's channel sees it (`server.lab.supervisor.Lab`)."""

    @property
    def runs(self) -> Sequence[FedRun]: ...
    @property
    def clock(self) -> Callable[[], float]: ...
    def control(self, box: str, action: ControlAction, origin: str) -> None: ...
    def annotate(self, box: str, text: str, origin: str) -> int: ...

    def store_line(self) -> str | None: ...


class FeedBuilder:
    """Feed lines from the lab's runs, `None` when no tile changed since the last line.

    A turn reads again only the boxes whose session produced a record since the last turn
    (`records_seen`: every change a tile shows comes with one), plus `SWEEP` boxes in
    rotation, so that anything changing without a record is still seen within a couple of
    seconds; and only a box whose facts changed is encoded again. Reading a box cold costs
    a few microseconds, encoding it more: most turns touch a handful of 32 boxes. Each line
    still carries every box, so the page simply replaces what it had.
    """

    SWEEP = 4

    def __init__(self, lab: FedLab):
        self.lab = lab
        self._seen: list[int] = []  # records_seen of each run when last read
        self._facts: list[BoxFacts] = []
        self._json: list[bytes] = []
        self._next = 0  # where the rotating sweep goes on
        self._unsent = True
        self._store: str | None = None

    def line(self) -> bytes | None:
        runs = self.lab.runs
        if len(runs) != len(self._facts):  # the lab's runs are made once, all together
            self._seen = [run.records_seen for run in runs]
            self._facts = [run.facts() for run in runs]
            self._json = [JSON.encode(facts).encode("utf-8") for facts in self._facts]
            self._unsent = True
        else:
            swept = {(self._next + k) % len(runs) for k in range(min(self.SWEEP, len(runs)))}
            self._next = (self._next + self.SWEEP) % max(1, len(runs))
            for i, run in enumerate(runs):
                if run.records_seen == self._seen[i] and i not in swept:
                    continue
                self._seen[i] = run.records_seen
                facts = run.facts()
                if facts != self._facts[i]:
                    self._facts[i] = facts
                    self._json[i] = JSON.encode(facts).encode("utf-8")
                    self._unsent = True
        store = self.lab.store_line()
        if store != self._store:
            self._store = store
            self._unsent = True
        if not self._unsent:
            return None
        self._unsent = False
        # Every run reads the lab's one session clock: "now" goes once, beside the facts.
        t = JSON.encode(self.lab.clock() if runs else 0.0).encode("ascii")
        extra = b"" if store is None else b',"store":' + JSON.encode(store).encode("utf-8")
        return b'{"feed":{"t":' + t + extra + b',"boxes":[' + b",".join(self._json) + b"]}}\n"

    def resend(self) -> None:
        """Send the next feed even if nothing changed (the last one was dropped)."""
        self._unsent = True


def answer(lab: FedLab, ask: dict[str, Any]) -> dict[str, Any]:
    """Apply one control the page asked for; its answer carries the HTTP status to give.

    404: the session is not running in this lab; 409: the lab refused (the session ended);
    422: an empty or overlong note; 503: the store could not keep the note.
    """
    op = ask.get("op")
    session_id = ask.get("session_id")
    origin = str(ask.get("origin") or "unknown")
    run = next((r for r in lab.runs if r.session_id == session_id), None)
    if run is None:
        return {"status": 404, "detail": f"session {session_id} is not running in this lab"}
    box = run.name
    if op in tuple(ControlAction):
        try:
            lab.control(box, ControlAction(op), origin)
        except ValueError as exc:
            return {"status": 409, "detail": str(exc)}
        return {"status": 200, "box": box}
    if op == "annotate":
        text = str(ask.get("text") or "").strip()
        if not text:
            return {"status": 422, "detail": "a note needs some text"}
        if len(text) > NOTE_LIMIT:
            return {"status": 422, "detail": f"a note is limited to {NOTE_LIMIT} characters"}
        try:
            note_id = lab.annotate(box, text, origin)
        except StoreError as exc:
            return {"status": 503, "detail": f"note not stored: {exc}"}
        return {"status": 201, "box": box, "note_id": note_id}
    return {"status": 400, "detail": "unknown action"}


class LabEnd:
    """Serves one page over `reader`/`writer` until the page's end closes (`run` returns)."""

    def __init__(
        self,
        lab: FedLab,
        reader: asyncio.StreamReader,
        writer: asyncio.StreamWriter,
        *,
        say: Callable[[str], None] = print,
        every_s: float = FEED_EVERY_S,
    ):
        self.lab = lab
        self.reader = reader
        self.writer = writer
        self.say = say
        self.every_s = every_s
        self.feed = FeedBuilder(lab)
        self.page_pid: int | None = None
        self.ready = asyncio.Event()
        self._feed_failed = False

    def send(self, message: dict[str, Any]) -> None:
        if not self.writer.is_closing():
            self.writer.write(encode(message))

    async def run(self) -> None:
        feeding = asyncio.create_task(self._feed())
        try:
            await self._answer()
        finally:
            feeding.cancel()
            await asyncio.gather(feeding, return_exceptions=True)

    def close(self) -> None:
        """Close the lab's end: the page's process reads EOF and exits."""
        self.writer.close()

    async def _feed(self) -> None:
        while not self.writer.is_closing():
            if self.writer.transport.get_write_buffer_size() > FEED_BACKLOG_BYTES:
                self.feed.resend()
            else:
                try:
                    line = self.feed.line()
                except Exception as exc:  # a fault here must never reach the sessions
                    if not self._feed_failed:
                        self.say(f"warning: status page feed failed: {exc!r}")
                    self._feed_failed = True
                else:
                    if line is not None:
                        self.writer.write(line)
            await asyncio.sleep(self.every_s)

    async def _answer(self) -> None:
        while True:
            try:
                line = await self.reader.readline()
            except (ValueError, ConnectionError):  # over LINE_LIMIT, or reset: stop listening
                return
            if not line:
                return
            try:
                message = decode(line)
            except ChannelError:
                continue
            if "ask" in message:
                try:
                    reply = answer(self.lab, message)
                except Exception as exc:  # the page asked something the lab cannot do
                    reply = {"status": 500, "detail": f"the lab could not apply it: {exc}"}
                self.send({"answer": message["ask"], **reply})
            elif "ready" in message:
                self.page_pid = message["ready"]
                self.ready.set()


async def open_lab_end(lab: FedLab, sock: Any, *, say: Callable[[str], None] = print) -> LabEnd:
    """The lab's end over a connected stream socket (its half of a socketpair)."""
    reader, writer = await asyncio.open_unix_connection(sock=sock, limit=LINE_LIMIT)
    return LabEnd(lab, reader, writer, say=say)
