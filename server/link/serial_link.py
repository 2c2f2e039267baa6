"""The box link over a serial line (a device, a pty or any pyserial URL), on the asyncio loop.

It is a `BoxLink` (server/engine/seams.py): accepted input edges go to the session it
serves, attached with `attach`, as `(InputEvent, session seconds)`; `send` turns session
commands into wire commands. All protocol state lives in HostSide (sans-I/O); this module
owns the port and the recovery policy. Both clocks come in from outside: `clock` (session
seconds) and `host_clock` (the protocol's own, monotonic by default), so the link can run
against a clock a test controls.

- reads are callbacks on the port's file descriptor (`loop.add_reader`), the fastest path
  measured here (DESIGN.md); ports without a descriptor are read by a thread;
- a lost link (read error, port gone, a command unacknowledged after every resend, or no
  line for 3 s) is recorded as `link_lost`; the session keeps running while the link reopens
  the port with backoff, greets the device again, asks a replay of the events it missed,
  drives every held output to what the session expects, and records `link_restored`;
- events that happened while the link was down are stored (device time, true session time,
  device_seq) but not fed to the session: it could not react to them when they happened.
"""

from __future__ import annotations

import asyncio
import math
import time
from collections.abc import Callable, Iterable
from typing import Any

from server.engine.records import Command, EventLogged, InputEvent, PulseOutput, SetOutput
from server.engine.seams import LinkSubscriber
from server.link.handshake import LinkError, check_identity, identity_problems
from server.link.host_side import (
    SILENCE_S,
    CommandApplied,
    CommandFailed,
    DeviceRestarted,
    EdgeArrived,
    EventsLost,
    Happening,
    HostSide,
    IdentitySeen,
)
from server.link.latency_timer import latency_warning
from server.link.messages import DriveCommand, Identity, PulseCommand
from server.link.serial_port import PORT_ERRORS, SerialPort, reason_of
from server.protocol.wiring import Wiring

BAUDRATE = 115_200  # the reference firmware's default (PROTOCOL.md section 9)
ASK_IDENTITY_EVERY_S = 0.5  # PROTOCOL.md section 5
GREET_WITHIN_S = 5.0  # boards that reset on open answer within 1-2 s
SYNC_PINGS = 12  # round trips taken at once after a greeting, to start the clock estimate
RETRY_FIRST_S, RETRY_MAX_S = 0.25, 2.0  # reconnect backoff


class _NoSession:
    """Until a session is attached: inputs and records have nowhere to go yet."""

    def input(self, event: InputEvent, t: float) -> None:
        pass

    def record(self, record: EventLogged) -> None:
        pass

    def cut_trial(self, reason: str) -> None:
        pass

    def expected_outputs(self) -> Iterable[str]:
        return ()

    def trial_index(self) -> int:
        return 0


class SerialLink:
    """One box's link; `connect()` before the session, `run()` beside it, `close()` after."""

    def __init__(
        self,
        box: str,
        url: str,
        wiring: Wiring,
        clock: Callable[[], float],
        *,
        host_clock: Callable[[], float] = time.monotonic,
        baudrate: int = BAUDRATE,
        say: Callable[[str], None] = print,
        on_close: Callable[[], None] | None = None,
        gone: Callable[[], str | None] | None = None,
        startup_s: float = GREET_WITHIN_S,
        greet_s: float = GREET_WITHIN_S,
    ) -> None:
        self.box = box
        self.url = url
        self.wiring = wiring
        self.clock = clock  # session seconds: the times of records and input events
        self._host = host_clock  # the protocol's own clock, unaffected by session start
        self.baudrate = baudrate
        self.say = say
        self.side = HostSide()
        self.connected = False
        self.identity: Identity | None = None
        self.losses = 0
        self._on_close = on_close
        self.startup_s = startup_s  # how long `connect` waits for the port to appear
        self.greet_s = greet_s  # how long a device may take to answer after the port opens
        self._gone = gone  # why the device behind the port cannot come (an exited emulator)
        self._inputs = {line.channel: line for line in wiring.inputs.values()}
        self._held = sorted((o for o in wiring.outputs.values() if not o.pulsed), key=lambda o: o.channel)
        self._pulsed = {o.channel: o.name for o in wiring.outputs.values() if o.pulsed}
        self._outputs = {o.channel: o.name for o in wiring.outputs.values()}
        self._port: SerialPort | None = None
        self._failure: str | None = None
        self._wake = asyncio.Event()
        self._greeting: asyncio.Future | None = None
        self._restored_at = -math.inf  # edges stamped before this missed their moment
        self._lost_at: float | None = None
        self._lost_trial = 0
        self._warned = False
        self._sleep_until = 0.0  # when the serve loop next wakes by itself
        self._closing = False
        self.closed_connected: bool | None = None  # at close: was the link up (None: not closed yet)
        self._session: LinkSubscriber = _NoSession()

    def attach(self, subscriber: LinkSubscriber) -> None:
        """Serve a session: where inputs and records go, what its outputs should be."""
        self._session = subscriber

    def _record(self, record: EventLogged) -> None:
        self._session.record(record)

    def _trial_index(self) -> int:
        return self._session.trial_index()

    # ------------------------------------------------------------ the port

    def _open(self) -> None:
        self._port = SerialPort(self.url, self.baudrate, self._take, self._fail)
        self._failure = None
        self.side.connection_opened(self._host())

    def _close_port(self) -> None:
        port, self._port = self._port, None
        if port is not None:
            port.close()

    def _flush(self) -> None:
        data = self.side.take_output()
        if data and self._port is not None:
            self._port.write(data)

    def _fail(self, reason: str) -> None:
        if self._failure is None:
            self._failure = reason
        self._wake.set()

    # ------------------------------------------------------------ receiving

    def _take(self, data: bytes) -> None:
        self._handle(self.side.receive(data, self._host()))
        self._flush()

    def _handle(self, happenings: list[Happening]) -> None:
        for h in happenings:
            if isinstance(h, EdgeArrived):
                self._edge(h)
            elif isinstance(h, IdentitySeen):
                if self._greeting is not None and not self._greeting.done():
                    self._greeting.set_result(h.identity)
            elif isinstance(h, CommandFailed):
                self._fail(f"command {h.pending.command.command_id} unacknowledged after "
                           f"{h.pending.attempts} sends")  # fmt: skip
            elif isinstance(h, DeviceRestarted):
                self._note("alarm", {"device_restarted": True, "old_boot": h.old_boot,
                                     "new_boot": h.new_boot, "trial": self._trial_index()})  # fmt: skip
                self.say(f"{self.box}: the device restarted (boot {h.old_boot} -> {h.new_boot}); "
                         f"events it held are gone")  # fmt: skip
                # A restarted board has every output off (its reset state): drive back what
                # the session expects now, as after a reconnect.
                if self.connected:
                    self._drive_held(set(self._session.expected_outputs()))
            elif isinstance(h, CommandApplied):
                self._applied(h)
            elif isinstance(h, EventsLost):
                self._note("alarm", {"events_lost": h.count, "first_seq": h.first})
                self.say(f"{self.box}: {h.count} device event(s) from #{h.first} were lost")

    def _edge(self, h: EdgeArrived) -> None:
        now = self.clock()
        t = min(h.host_s - (self._host() - now), now)  # host seconds -> session seconds
        line = self._inputs.get(h.edge.channel)
        value = 1.0 if h.edge.rising else 0.0
        if line is None or t < self._restored_at:
            detail = {"unwired_channel": h.edge.channel} if line is None else {"during_link_loss": True}
            name = line.name if line is not None else f"channel {h.edge.channel}"
            self._record(EventLogged(t, "input", name, value, h.edge.device_us, h.seq, detail))
            return
        self._session.input(InputEvent(line.name, h.edge.rising, h.edge.device_us, h.seq), t)

    def _applied(self, h: CommandApplied) -> None:
        """An `applied` event: the output command as the device carried it out, with the
        device's clock (what aligns a sync pulse with another recording)."""
        command = h.pending.command
        if not isinstance(command, DriveCommand | PulseCommand):
            return
        now = self.clock()
        t = min(h.host_s - (self._host() - now), now)  # host seconds -> session seconds
        value = float(command.ms) if isinstance(command, PulseCommand) else (1.0 if command.on else 0.0)
        detail: dict = {"command_id": command.command_id}
        if h.pending.attempts > 1:
            detail["sends"] = h.pending.attempts  # the ack may be to a repeat, after the change
        name = self._outputs.get(command.channel, f"channel {command.channel}")
        self._record(EventLogged(t, "applied", name, value, h.device_us, None, detail))

    def _note(self, kind: str, detail: dict) -> None:
        self._record(EventLogged(self.clock(), kind, "link", None, detail=detail))

    # ------------------------------------------------------------ sending

    def send(self, commands: list[Command]) -> None:
        now = self._host()
        for command in commands:
            if not self.connected:
                if isinstance(command, PulseOutput):
                    self._record(EventLogged(self.clock(), "note", command.name, None, detail={
                        "not_delivered": "link lost", "trial": self._trial_index()}))  # fmt: skip
                continue  # held outputs are restored from the session's state on return
            if isinstance(command, SetOutput):
                self.side.drive(command.channel, command.active, now)
            else:
                self.side.pulse(command.channel, command.ms, now)
        self._flush()
        if min(now + self.side.pending.resend_after_s, self.side.next_deadline()) < self._sleep_until:
            # The serve loop sleeps past this command's resend time, or past the end of the
            # pulse a held-back pulse waits for (which would otherwise go out only at the next
            # ping, about 250 ms late).
            self._wake.set()

    def _drive_held(self, expected: set[str]) -> None:
        now = self._host()
        for line in self._held:
            self.side.drive(line.channel, line.name in expected, now)
        self._flush()

    # ------------------------------------------------------------ greeting

    async def _greet(self, within_s: float) -> Identity:
        """Ask for the device's identity every 0.5 s until it answers (boards reset on open)."""
        loop = asyncio.get_running_loop()
        self._greeting = loop.create_future()
        end = self._host() + within_s
        try:
            while True:
                self.side.ask_identity(self._host())
                self._flush()
                try:
                    async with asyncio.timeout(min(ASK_IDENTITY_EVERY_S, max(0.0, end - self._host()))):
                        return await asyncio.shield(self._greeting)
                except TimeoutError:
                    if self._failure is not None:
                        raise LinkError(f"box '{self.box}': {self._failure}") from None
                    if self._host() >= end:
                        raise LinkError(
                            f"box '{self.box}' is not answering on {self.url} (no identity within {within_s:g} s)"
                        ) from None
        finally:
            self._greeting = None

    async def _sync_burst(self) -> None:
        """A few quick round trips so the clock estimate starts from the fastest of them."""
        ids = []
        for _ in range(SYNC_PINGS):
            ids.append(self.side.ask("beat", self._host()).command_id)
            self._flush()
            await asyncio.sleep(0.01)
        end = self._host() + 0.5
        while any(cid in self.side.pending for cid in ids) and self._host() < end:
            await asyncio.sleep(0.01)

    async def connect(self, startup_s: float | None = None) -> Identity:
        """Open the port (waiting up to `startup_s` for it to appear), greet the device and
        check it against the wiring; outputs start in their safe state.

        Raises LinkError (HandshakeError for a wrong device) with every problem named.
        """
        end = self._host() + (self.startup_s if startup_s is None else startup_s)
        while True:
            try:
                self._open()
                break
            except PORT_ERRORS as exc:
                why = self._gone() if self._gone is not None else None
                if why:
                    raise LinkError(f"box '{self.box}': {why}") from None
                if self._host() >= end:
                    raise LinkError(f"box '{self.box}': cannot open {self.url}: {reason_of(exc)}") from None
                await asyncio.sleep(0.05)
        try:
            identity = await self._greet(self.greet_s)
            check_identity(self.box, identity, self.wiring)
        except BaseException:
            self._close_port()
            raise
        self.identity = identity
        warning = latency_warning(self.box, self.url)
        if warning and not self._warned:
            self._warned = True
            self.say(warning)
        await self._sync_burst()
        self._drive_held(set())
        self.connected = True
        return identity

    # ------------------------------------------------------------ running

    async def run(self) -> None:
        """Serve the link for as long as the session lasts, reconnecting when it drops."""
        while not self._closing:
            if self._port is None or not self.connected:
                await self._reconnect()
                continue
            await self._serve()
            if not self._closing:
                self._lose(self._failure or "link failed")

    async def _serve(self) -> None:
        side = self.side
        while self._failure is None and not self._closing:
            now = self._host()
            self._handle(side.poll(now))
            self._flush()
            if self._failure is not None:  # a command given up on just now
                break
            if side.silent_for(now) >= SILENCE_S:
                self._fail(f"no line from the device for {SILENCE_S:g} s")
                break
            deadline = min(side.next_deadline(), (side.last_line_s or now) + SILENCE_S)
            self._sleep_until = deadline
            self._wake.clear()
            try:
                async with asyncio.timeout(max(0.0, deadline - self._host())):
                    await self._wake.wait()
            except TimeoutError:
                pass

    def tick(self) -> None:
        """Read the host clock again now: pings, resends and timeouts due by it happen at once.

        The serve loop sleeps until the next deadline as the host clock foresees it; a caller
        whose host clock jumps (a test running the link in virtual time) wakes it here.
        """
        self._wake.set()

    def _lose(self, reason: str) -> None:
        now = self.clock()
        self.connected = False
        self.losses += 1
        self._close_port()
        unacked = self.side.connection_lost()
        self._lost_at, self._lost_trial = now, self._trial_index()
        self._session.cut_trial("link lost")  # the trial in progress is stored as interrupted
        self._restored_at = math.inf  # until the link returns, every edge is a missed one
        pulses = [p.command.command_id for p in unacked if isinstance(p.command, PulseCommand)]
        detail: dict[str, Any] = {"reason": reason, "trial": self._lost_trial}
        if pulses:
            detail["unconfirmed_pulses"] = pulses
        self._record(EventLogged(now, "link_lost", "link", None, detail=detail))
        self.say(f"{self.box}: link lost ({reason}); reconnecting")

    async def _reconnect(self) -> None:
        delay = RETRY_FIRST_S
        wrong_device = False
        while not self._closing:
            try:
                self._open()
                identity = await self._greet(self.greet_s)
                problems = identity_problems(identity, self.wiring)
                if problems:  # another device on this port: never drive it
                    if not wrong_device:
                        wrong_device = True
                        self._note("alarm", {"wrong_device": problems})
                        self.say(f"{self.box}: another device answers on {self.url}; waiting "
                                 f"for the right one ({'; '.join(problems)})")  # fmt: skip
                    raise LinkError("; ".join(problems))
                break
            except PORT_ERRORS + (LinkError,):
                self._close_port()
            await asyncio.sleep(delay)
            delay = min(delay * 1.6, RETRY_MAX_S)
        if self._closing:
            return
        self.identity = identity
        await self._sync_burst()
        now = self.clock()
        expected = set(self._session.expected_outputs())
        self._drive_held(expected)
        self._restored_at = now
        self.connected = True
        down = now - (self._lost_at if self._lost_at is not None else now)
        self._record(EventLogged(now, "link_restored", "link", None, detail={
            "down_s": round(down, 3), "trial_at_loss": self._lost_trial,
            "trial": self._trial_index(), "outputs_on": sorted(expected),
            "replay_from": self.side.tracker.expected if self.side.tracker else None,
            "boot": identity.boot,
        }))  # fmt: skip
        self.say(f"{self.box}: link restored after {down:.1f} s")

    def _unsettled(self, now: float, acks_until: float, events_until: float) -> bool:
        """Commands still unacknowledged (until `acks_until`), or device events still to be
        replayed (until `events_until`)."""
        tracker = self.side.tracker
        return (bool(len(self.side.pending)) and now < acks_until) or (
            tracker is not None and tracker.missing and now < events_until
        )

    async def close(self, timeout_s: float = 1.0, replay_s: float = 3.0) -> bool:
        """Wait (up to `timeout_s`) for every command to be acknowledged, then close the port.

        Returns True when nothing was left unacknowledged. Events the device has shown but
        the host has not yet taken in order (a dropped line just before the end, such as the
        box confirming its safe state) are asked for again for up to `replay_s` (a replay
        request or its answer can be dropped too: each is asked again after half a second),
        so a clean close keeps every event. Outputs left on by a link that could not say so
        are turned off by the device itself after 5 s of host silence.
        """
        start = self._host()
        acks_until, events_until = start + timeout_s, start + max(timeout_s, replay_s)
        while self.connected and self._unsettled(self._host(), acks_until, events_until):
            self._wake.set()
            await asyncio.sleep(0.01)
        acknowledged = self.connected and not len(self.side.pending)
        self.closed_connected = self.connected
        self._closing = True
        self.connected = False
        self._wake.set()
        self._close_port()
        if self._on_close is not None:
            self._on_close()
        return acknowledged
