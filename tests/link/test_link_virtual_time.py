"""The serial link's timeouts run on the host clock it is given, not on the wall clock.

A real pseudo-terminal carries the bytes, the device side is the firmware's state machine
(hardware_stubs/box_wire.py) on the pty master, and both the link's host clock and the
device's clock are a virtual clock the test moves. So seconds of link time pass in
milliseconds: the 3 s silence rule and the give-up after every resend are checked at the
exact host times they are specified for (PROTOCOL.md sections 5 and 9), and nothing happens
while the clock stands still however long the wall clock runs.
"""

from __future__ import annotations

import asyncio
import os
import time
import tty

import pytest

from hardware_stubs.box_wire import DeviceWire
from server.engine.records import EventLogged, InputEvent, SetOutput
from server.link.codec import Decoder
from server.link.handshake import device_channels
from server.link.host_side import SILENCE_S
from server.link.messages import DriveCommand
from server.link.serial_link import SerialLink
from server.protocol.load import parse_protocol

# A scenario of our own: one light the host holds on, one lever the animal presses.
LIGHT_BOX = """\
vigil_protocol: 1
name: virtual clock check
wiring:
  outputs:
    cage_light: {kind: house_light, channel: 3}
  inputs:
    press: {kind: lever_press, channel: 1}
trial_types:
  idle:
    steps:
      - step: rest
        wait_s: 1
blocks:
  - block: only
    trial_types: [idle]
    until: {trials: 1}
"""


class VirtualClock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


class Recorder:
    """The session side of the link: what it records and the inputs it is handed."""

    def __init__(self) -> None:
        self.records: list[EventLogged] = []
        self.inputs: list[InputEvent] = []

    def input(self, event: InputEvent, t: float) -> None:
        self.inputs.append(event)

    def record(self, record: EventLogged) -> None:
        self.records.append(record)

    def cut_trial(self, reason: str) -> None:
        pass

    def expected_outputs(self):
        return ("cage_light",)

    def trial_index(self) -> int:
        return 1

    def kinds(self) -> list[str]:
        return [r.kind for r in self.records]


class VirtualDevice:
    """The box's side on a pty master, on the virtual clock; it can go mute or ignore drives."""

    def __init__(self, wiring, clock: VirtualClock) -> None:
        inputs, outputs = device_channels(wiring)
        self.clock = clock
        self.wire = DeviceWire(inputs, outputs, lambda ch, on: None, 777, self.now_us())
        self.mute = False
        self.ignore_drives_of: int | None = None
        self.drives_seen = 0
        self.lines_seen = 0  # every host line, kept or not
        self._peek = Decoder(source="host")
        master, slave = os.openpty()
        tty.setraw(slave)
        os.set_blocking(master, False)
        self.master, self.slave = master, slave
        self.path = os.ttyname(slave)
        asyncio.get_running_loop().add_reader(master, self._readable)

    def now_us(self) -> int:
        return int(self.clock.now * 1e6) % 2**32

    def close(self) -> None:
        asyncio.get_running_loop().remove_reader(self.master)
        os.close(self.master)
        os.close(self.slave)

    def _readable(self) -> None:
        try:
            data = os.read(self.master, 4096)
        except OSError:
            return
        kept = b""
        for line in data.splitlines(keepends=True):
            self.lines_seen += 1
            messages = self._peek.feed(line)
            ignored = any(isinstance(m, DriveCommand) and m.channel == self.ignore_drives_of for m in messages)
            self.drives_seen += sum(isinstance(m, DriveCommand) and m.channel == 3 for m in messages)
            if not ignored:
                kept += line
        if self.mute:
            return
        self.wire.receive(kept, self.now_us())
        now = self.now_us()
        self.wire.tick(now)
        for out in self.wire.write_all(now):
            os.write(self.master, out)


async def settle(real_s: float = 0.03) -> None:
    """Let the bytes cross the pty and both sides react (wall time; the virtual clock stands)."""
    await asyncio.sleep(real_s)


async def advance(link: SerialLink, clock: VirtualClock, seconds: float, step: float = 0.05) -> None:
    """Move the host clock on in small steps, letting the link act at each one."""
    end = clock.now + seconds
    while clock.now < end - 1e-9:
        clock.now = min(end, clock.now + step)
        link.tick()
        await settle(0.005)


@pytest.fixture
def wiring():
    return parse_protocol(LIGHT_BOX).wiring


async def connected(wiring, clock):
    device = VirtualDevice(wiring, clock)
    session = Recorder()
    link = SerialLink("vt1", device.path, wiring, clock, host_clock=clock, say=lambda _: None)
    link.attach(session)
    await link.connect()
    runner = asyncio.create_task(link.run())
    await settle()
    return device, session, link, runner


async def finish(device, link, runner) -> None:
    await link.close(timeout_s=0, replay_s=0)
    runner.cancel()
    device.close()


def test_three_host_seconds_of_silence_lose_the_link_in_a_fraction_of_a_wall_second(wiring):
    async def scenario():
        clock = VirtualClock()
        device, session, link, runner = await connected(wiring, clock)
        # The device answers its pings: ten host seconds pass with the link up.
        await advance(link, clock, 10.0, step=0.25)
        assert link.connected and "link_lost" not in session.kinds()
        device.mute = True
        muted_at = clock.now
        wall_start = time.monotonic()
        await advance(link, clock, SILENCE_S - 0.6)
        assert link.connected, "lost before the 3 s of silence were up"
        await advance(link, clock, 1.0)
        wall = time.monotonic() - wall_start
        lost = [r for r in session.records if r.kind == "link_lost"]
        assert len(lost) == 1
        assert "no line from the device for 3 s" in lost[0].detail["reason"]
        # The last line before the mute came at most one ping interval before it.
        assert muted_at + SILENCE_S - 1.0 <= lost[0].t <= muted_at + SILENCE_S + 0.1
        assert wall < SILENCE_S / 2  # the wall clock had no part in it
        await finish(device, link, runner)

    asyncio.run(scenario())


def test_a_drive_never_acknowledged_is_resent_then_given_up_on_host_time(wiring):
    async def scenario():
        clock = VirtualClock()
        device, session, link, runner = await connected(wiring, clock)
        device.ignore_drives_of = 3
        before = device.drives_seen
        resend_s, attempts = link.side.pending.resend_after_s, link.side.pending.max_attempts
        link.send([SetOutput("cage_light", 3, True)])
        await settle()
        # With the clock still, real time passes and nothing is resent.
        await settle(0.3)
        assert device.drives_seen - before == 1
        sent_at = clock.now
        await advance(link, clock, resend_s * (attempts - 1) + 0.01, step=resend_s / 4)
        assert device.drives_seen - before == attempts
        assert link.connected
        await advance(link, clock, resend_s, step=resend_s / 4)
        lost = [r for r in session.records if r.kind == "link_lost"]
        assert len(lost) == 1
        assert f"unacknowledged after {attempts} sends" in lost[0].detail["reason"]
        assert lost[0].t == pytest.approx(sent_at + resend_s * attempts, abs=resend_s / 4 + 1e-6)
        await finish(device, link, runner)

    asyncio.run(scenario())


def test_with_the_host_clock_standing_still_no_ping_is_sent(wiring):
    async def scenario():
        clock = VirtualClock()
        device, session, link, runner = await connected(wiring, clock)
        await advance(link, clock, 2.0, step=0.25)  # pings go out and are answered
        assert device.lines_seen > 0
        device.mute = True
        heard = device.lines_seen
        await settle(1.5)  # longer than the 1 s ping interval, in wall time only
        assert device.lines_seen == heard
        assert link.connected
        await finish(device, link, runner)

    asyncio.run(scenario())
