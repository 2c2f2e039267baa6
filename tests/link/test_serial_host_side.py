"""The host side of the conversation (server/link/host_side.py) against the device side
(hardware_stubs/box_wire.py), wired back to back in virtual time: lost lines both ways, a
ring that overflowed while the host was away, and a device that restarted."""

from __future__ import annotations

import numpy as np

from hardware_stubs.box_wire import RING, DeviceWire
from server.link.host_side import CommandApplied, DeviceRestarted, EdgeArrived, EventsLost, HostSide
from server.link.messages import Channel

INPUTS = (Channel(0, "lever_press"), Channel(2, "head_entry"))
OUTPUTS = (Channel(0, "lever"), Channel(5, "feeder"))


class BackToBack:
    """Host and device exchanging lines every 10 ms of virtual time, dropping some."""

    def __init__(self, device: DeviceWire, drop: float = 0.0, seed: int = 0) -> None:
        self.host = HostSide(first_id=500)
        self.device = device
        self.rng = np.random.default_rng(seed)
        self.drop = drop
        self.t = 0.0
        self.arrived: list[EdgeArrived] = []
        self.other: list[object] = []
        self.connected = True

    def _lines(self, data: bytes) -> bytes:
        lines = data.split(b"\n")[:-1]
        return b"".join(ln + b"\n" for ln in lines if self.rng.random() >= self.drop)

    def run(self, seconds: float) -> None:
        for _ in range(round(seconds / 0.01)):
            self.t += 0.01
            us = round(self.t * 1e6)
            self.device.tick(us)
            out = self.device.write_all(us)
            if not self.connected:
                continue  # the cable is out: the device writes into the void
            for h in self.host.poll(self.t):
                self.other.append(h)
            self.device.receive(self._lines(self.host.take_output()), us)
            out += self.device.write_all(us)
            for h in self.host.receive(self._lines(b"".join(out)), self.t):
                (self.arrived if isinstance(h, EdgeArrived) else self.other).append(h)

    def reconnect(self) -> None:
        self.connected = True
        self.host.connection_lost()
        self.host.connection_opened(self.t)
        self.host.ask_identity(self.t)


def device(boot: int, us: int = 0) -> DeviceWire:
    return DeviceWire(INPUTS, OUTPUTS, lambda ch, on: None, boot, us)


def test_lines_lost_both_ways_still_give_every_event_once_in_order():
    link = BackToBack(device(7), drop=0.1, seed=4)
    link.host.ask_identity(0.0)
    link.run(0.1)
    made = []
    for k in range(300):
        made.append(link.device.add_event(k % 2 * 2, k % 3 == 0, round(link.t * 1e6)))
        link.run(0.03)
    link.run(3.0)
    assert [a.seq for a in link.arrived] == made == list(range(1, 301))
    assert link.host.tracker.duplicates > 0  # replays did resend some events


def test_a_ring_overrun_while_away_is_reported_and_numbering_goes_on():
    link = BackToBack(device(7))
    link.host.ask_identity(0.0)
    link.run(0.2)
    link.connected = False
    for _ in range(RING + 40):  # more events than the ring holds, all while the cable is out
        link.device.add_event(0, True, round(link.t * 1e6))
    link.run(0.5)
    link.reconnect()
    link.run(1.0)
    lost = [h for h in link.other if isinstance(h, EventsLost)]
    assert lost == [EventsLost(1, 40)]  # PROTOCOL.md section 6: ack "lost", value = oldest held
    assert [a.seq for a in link.arrived] == list(range(41, RING + 41))


def test_a_restarted_device_keeps_stored_numbers_running_on():
    link = BackToBack(device(7))
    link.host.ask_identity(0.0)
    link.run(0.2)
    for _ in range(5):
        link.device.add_event(0, True, round(link.t * 1e6))
    link.run(0.5)
    link.device = device(8, round(link.t * 1e6))  # power cycled: a new boot id, numbers from 1
    link.run(0.2)
    for _ in range(3):
        link.device.add_event(2, True, round(link.t * 1e6))
    link.run(1.5)
    assert [h for h in link.other if isinstance(h, DeviceRestarted)] == [DeviceRestarted(7, 8)]
    assert [(a.edge.seq, a.seq) for a in link.arrived] == [
        (1, 1), (2, 2), (3, 3), (4, 4), (5, 5), (1, 6), (2, 7), (3, 8)
    ]  # fmt: skip


def _commands(link: BackToBack, count: int) -> list[CommandApplied]:
    link.host.ask_identity(0.0)
    link.run(0.5)
    for k in range(count):
        link.host.pulse(5, 30, link.t)
        link.run(0.1)
        link.host.drive(0, k % 2 == 0, link.t)
        link.run(0.1)
    link.run(3.0)
    return [h for h in link.other if isinstance(h, CommandApplied)]


def test_an_acknowledged_output_command_is_reported_with_the_device_time_of_its_ack():
    applied = _commands(BackToBack(device(7)), 40)
    assert [type(h.pending.command).__name__ for h in applied] == ["PulseCommand", "DriveCommand"] * 40
    for h in applied:
        # The device's clock is in step with virtual time here: it wrote the ack within a
        # 10 ms exchange of the send, and the host's reading of that time is never in the future.
        assert 0 <= h.device_us - round(h.pending.first_sent_s * 1e6) <= 20_000
        # ... and the host's clock fit maps it back to within a 10 ms exchange of that
        assert abs(h.host_s - h.device_us / 1e6) <= 0.01


def test_with_lines_lost_each_acknowledged_command_is_reported_once():
    applied = _commands(BackToBack(device(7), drop=0.2, seed=9), 40)
    ids = [h.pending.command.command_id for h in applied]
    assert len(ids) == len(set(ids)) > 40  # no queries, no replays, and no command twice
    assert any(h.pending.attempts > 1 for h in applied)  # some were answered only after a resend
