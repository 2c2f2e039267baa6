"""Bytes damaged on the line, both ways, between the real host link and the simulated board:
every damaged line is rejected by the CRC check on the side that receives it and counted
there, no output changes because of one, and no input event is lost or doubled."""

from __future__ import annotations

import asyncio
import time

from hardware_stubs.simulated_board import HERE
from server.engine.records import PulseOutput, SetOutput
from server.link.serial_link import SerialLink
from server.protocol.load import load_protocol


class Inputs:
    """The session's side of the link, reduced to collecting the input edges it delivers."""

    def __init__(self, queue: asyncio.Queue) -> None:
        self.queue = queue

    def input(self, event, t: float) -> None:
        self.queue.put_nowait((event, t))

    def record(self, record) -> None:
        pass

    def cut_trial(self, reason: str) -> None:
        pass

    def expected_outputs(self):
        return ()

    def trial_index(self) -> int:
        return 0


WIRING = load_protocol(HERE.parent / "protocols" / "lever_training_devaluation.yaml").wiring
LEVER, ROOM_LIGHT, PELLET = (WIRING.outputs[n] for n in ("lever", "room_light", "pellet"))


def test_damaged_lines_are_rejected_counted_and_change_nothing(board):
    presses = 12

    async def session() -> tuple[list, SerialLink]:
        link = SerialLink("noisy", str(board.link), WIRING, time.monotonic, say=lambda s: None)
        inputs: asyncio.Queue = asyncio.Queue()
        link.attach(Inputs(inputs))
        await link.connect()
        # A line cut in half by the port's opening may already be counted: start from here.
        link.rejected_before_noise = link.side.decoder.rejected_total
        runner = asyncio.create_task(link.run())
        board.noise("rx", 3)  # one byte changed in 1 host line of 3 ...
        board.noise("tx", 4)  # ... and in 1 board line of 4
        board.script([(k * 150_000 + d, ch, on) for k in range(presses)
                      for ch, d, on in (((1, 0, True), (1, 60_000, False))
                                        if k % 2 == 0 else ((3, 0, True), (3, 80_000, False)))])  # fmt: skip
        for k in range(4):
            link.send([SetOutput(ROOM_LIGHT.name, ROOM_LIGHT.channel, k % 2 == 0)])
            link.send([SetOutput(LEVER.name, LEVER.channel, k % 2 == 0)])
            link.send([PulseOutput(PELLET.name, PELLET.channel, PELLET.pulse_ms)])
            await asyncio.sleep(0.4)
        events = []
        end = time.monotonic() + 8
        while len(events) < 2 * presses and time.monotonic() < end:
            events.append(await asyncio.wait_for(inputs.get(), 8))
        board.noise("rx", 0)
        board.noise("tx", 0)
        await asyncio.sleep(1.3)  # a clean heartbeat brings the board's count
        while len(link.side.pending) and time.monotonic() < end:
            await asyncio.sleep(0.05)
        runner.cancel()
        await link.close()
        return events, link

    events, link = asyncio.run(session())
    corrupted = {k: len(v) for k, v in board.corrupted.items()}
    host_rejected = link.side.decoder.rejected_total - link.rejected_before_noise
    print(f"\nlines damaged: to the board {corrupted['rx']}, to the host {corrupted['tx']}; "
          f"rejected: by the board {link.side.rx_rejected_by_device}, by the host "
          f"{host_rejected} {dict(link.side.decoder.rejected)}")  # fmt: skip
    assert corrupted["rx"] >= 5 and corrupted["tx"] >= 5
    # A changed byte is an error burst of at most 8 bits: CRC-16 catches every one
    # (PROTOCOL.md section 2); each side drops and counts the line (section 8).
    # The board may drop one more now and then: after a damaged line the host's resends,
    # pings and replay requests can come faster than the board's (longer) acks leave, and a
    # full receive ring drops a byte (main_avr.c, USART_RX_vect), so that line fails too.
    assert corrupted["rx"] <= link.side.rx_rejected_by_device <= corrupted["rx"] + 2
    assert host_rejected == corrupted["tx"]
    # Every input edge arrived exactly once, in device order.
    assert [e.device_seq for e, _ in events] == list(range(1, 2 * presses + 1))
    assert [(e.name, e.rising) for e, _ in events][:4] == [
        ("press", True),
        ("press", False),
        ("magazine", True),
        ("magazine", False),
    ]
    # Outputs changed exactly as commanded, once each, whatever the resends.
    assert link.losses == 0  # damaged lines are not a lost link
    # (A resent command may overtake a later one on another channel: compare per channel. A
    # set still unacknowledged when the next one for its output is sent is replaced by it, so
    # an on may be skipped; a stale one is never carried out late.)
    for channel in (LEVER.channel, ROOM_LIGHT.channel):
        levels = [c.level for c in board.output_log(channel)[1:]]
        assert levels in ([1, 0, 1, 0], [1, 0], [0]) or levels == [], (channel, levels)
    assert sum(len(board.output_log(ch)) - 1 for ch in (1, 5)) >= 6  # most went through
    pulses = board.pulses_us(PELLET.channel)
    assert len(pulses) == 4 and all(abs(w - 30_000) <= 100 for _, w in pulses)
    assert not [c for c in board.outputs[10:] if c.channel not in (1, 5, 7)]
