"""Closed-loop latency through the reference firmware on a simulated board (simavr): from the
lever pin's edge to the feeder pin's rising edge, both stamped in simulated CPU cycles.

The path: the board debounces the press (2 ms), writes an `edge` line on its UART (115,200
baud, timed byte by byte by the harness), the pty, the lab's serial link, session core and
store exactly as `vigil run` runs them, a `pulse` line back over the UART, and the board
turning the feeder on. Used by `python bench/latency.py --firmware`.
"""

from __future__ import annotations

import asyncio
import threading
import time
from pathlib import Path

import numpy as np

from hardware_stubs.simulated_board import FREQ_HZ, SimulatedBoard
from server.link.codec import encode
from server.link.messages import Edge, PulseCommand

# A scenario of our own on the reference box's channels: each press one pellet.
FR1_BOARD = """\
vigil_protocol: 1
name: press-to-pellet latency on the reference board
about: Every press on the left lever earns one pellet.
wiring:
  outputs:
    lever: {kind: lever, channel: 1}
    room_light: {kind: house_light, channel: 5}
    pellet: {kind: feeder, channel: 7, pulse_ms: 20}
  inputs:
    press: {kind: lever_press, channel: 1, presented_by: lever}
    magazine: {kind: head_entry, channel: 3}
at_start: {activate: [room_light, lever]}
trial_types:
  continuous:
    steps:
      - step: work
        schedule: {input: press, kind: FR, value: 1, on_met: reward}
      - step: reward
        pulse: pellet
        wait_s: 0
blocks:
  - block: training
    trial_types: [continuous]
    until: {trials: 1000000}
    next: end_session
"""
LEVER, FEEDER = 1, 7
HOLD_US = 20_000  # the switch stays closed this long (far above the 2 ms debounce)
DEBOUNCE_MS = 2.0  # PROTOCOL.md section 9: the edge is sent once the level held 2 ms
BAUD = 16_000_000 / (8 * (16 + 1))  # the firmware's UBRR 16 with U2X at 16 MHz: 117,647 baud
FRAME_BITS = 10  # 8N1: start, 8 data, stop


def line_ms(edge_seq: int, device_us: int, command_id: int) -> float:
    """Wire time of the two lines on the loop: the board's edge and the host's pulse."""
    n = len(encode(Edge(edge_seq, LEVER, True, device_us))) + len(encode(PulseCommand(command_id, FEEDER, 20)))
    return n * FRAME_BITS / BAUD * 1e3


async def run(samples: int, warmup: int, folder: Path, lab_host) -> dict:
    protocol = folder / "fr1-board.yaml"
    protocol.write_text(FR1_BOARD)
    board = SimulatedBoard.start(folder / "bench-board.tty")
    loop = asyncio.get_running_loop()
    until = loop.create_future()
    rng = np.random.default_rng(11)
    presses: list[int] = []

    def press_loop() -> None:
        try:
            if not board.wait_for(lambda b: any(c.channel == LEVER and c.level for c in b.outputs), 30):
                return
            for _ in range(samples + warmup + 5):  # a few spare: the first `samples` count
                pellets = sum(1 for c in board.output_log(FEEDER) if c.level)
                presses.append(board.press(LEVER, HOLD_US))
                board.wait_for(lambda b, before=pellets: sum(1 for c in b.outputs if c.channel == FEEDER and c.level)
                               > before, 2.0)  # fmt: skip
                time.sleep(HOLD_US / 1e6 + float(rng.uniform(0.01, 0.04)))
        finally:
            loop.call_soon_threadsafe(lambda: until.done() or until.set_result(None))

    thread = threading.Thread(target=press_loop, daemon=True)
    thread.start()
    try:
        await lab_host([str(board.link)], until, folder, str(protocol))
        thread.join(timeout=5)
        stats = board.stats()
        edges_at = [c.cycle for c in board.inputs if c.channel == LEVER and c.level]
        feeder_on = [c.cycle for c in board.output_log(FEEDER) if c.level]
    finally:
        board.close()
    latencies = []
    for press in edges_at[warmup:]:
        answer = next((f for f in feeder_on if f > press), None)
        if answer is not None:
            latencies.append((answer - press) / FREQ_HZ)
    latencies = latencies[:samples]
    # Typical line lengths: event numbers in the thousands, a board time of 9 digits, a
    # host command id of 10 (random 31-bit start, PROTOCOL.md section 3).
    wire = line_ms(1_000, 123_456_789, 1_234_567_890)
    return {"samples": latencies, "line_ms": wire, "lag_max_us": stats.get("lag_max_us", 0.0),
            "resyncs": stats.get("resyncs", 0.0)}  # fmt: skip
