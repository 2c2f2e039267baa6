"""A virtual animal working a simulated board through its pins.

The animal (hardware_stubs/agents) lives in an EmulatedBox as in the emulated boxes; here the
box's outputs come from the board's output pins (a lever is out while its pin is high, a
feeder pulse drops a pellet) and the animal's presses, pokes and head entries are driven on
the board's input pins. So a whole session runs on the real firmware image with an animal
that reacts to what the board does, not to what the host meant it to do.
"""

from __future__ import annotations

import threading
import time

import numpy as np

from hardware_stubs.agents import make_agent
from hardware_stubs.emulated_box import EmulatedBox
from hardware_stubs.simulated_board import SimulatedBoard
from server.engine.records import PulseOutput, SetOutput
from server.protocol.wiring import Wiring

STEP_S = 0.002  # how often the animal looks at the pins: far below its reaction times


class BoardAnimal:
    """`start()` a thread that couples `agent` to `board` by the protocol's `wiring`."""

    def __init__(self, board: SimulatedBoard, wiring: Wiring, agent: str, seed: int,
                 **options: object) -> None:  # fmt: skip
        self.board = board
        self.box = EmulatedBox(wiring, make_agent(agent, **options), np.random.default_rng(seed))
        self._outputs = {line.channel: line for line in wiring.outputs.values()}
        self._inputs = {line.name: line.channel for line in wiring.inputs.values()}
        self._seen = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self.edges = 0

    def start(self) -> BoardAnimal:
        self._t0 = time.monotonic()
        self._thread.start()
        return self

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(timeout=2)

    def _run(self) -> None:
        while not self._stop.wait(STEP_S):
            now = time.monotonic() - self._t0
            with self.board._changed:
                changes = self.board.outputs[self._seen :]
            self._seen += len(changes)
            for change in changes:
                line = self._outputs.get(change.channel)
                if line is None:
                    continue
                if not line.pulsed:
                    self.box.apply(SetOutput(line.name, line.channel, bool(change.level)), now)
                elif change.level:
                    self.box.apply(PulseOutput(line.name, line.channel, max(1, line.pulse_ms)), now)
            for _, event in self.box.pop_due(now):
                self.board.drive(self._inputs[event.name], event.rising)
                self.edges += 1
