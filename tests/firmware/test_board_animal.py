"""A virtual animal on the simulated board's pins runs a session through `vigil run`: it
presses only while the board holds a lever out, and every edge it made is stored once."""

from __future__ import annotations

import sqlite3
import subprocess
import sys
from pathlib import Path

import yaml

from hardware_stubs.board_animal import BoardAnimal
from hardware_stubs.simulated_board import HERE
from server.protocol.load import load_protocol

PROTOCOL = HERE.parent / "protocols" / "lever_training_devaluation.yaml"


def vigil_run_with_animal(board, protocol: Path, animal: BoardAnimal, minutes: float, box: dict,
                          tmp_path: Path) -> sqlite3.Connection:  # fmt: skip
    """`vigil run` of one box (`box`: name, animal, seed) on `board`'s port for `minutes`, with
    `animal` started on its pins meanwhile; returns the run's database."""
    config = {"lab": "animal", "database": str(tmp_path / "lab.sqlite"),
              "caps": {"max_rewards": 250, "max_minutes": 5},
              "boxes": [{**box, "protocol": str(protocol), "port": str(board.link)}]}  # fmt: skip
    lab = tmp_path / "lab.yaml"
    lab.write_text(yaml.safe_dump(config))
    animal.start()
    try:
        done = subprocess.run([sys.executable, "-m", "server.cli", "run", str(lab), "--minutes", str(minutes),
                               "--port", "0"], capture_output=True, text=True, timeout=90, cwd=tmp_path)  # fmt: skip
    finally:
        animal.stop()
    assert done.returncode == 0, done.stdout + done.stderr
    return sqlite3.connect(tmp_path / "lab.sqlite")


def test_an_agent_on_the_pins_earns_pellets_through_vigil_run(board, tmp_path):
    animal = BoardAnimal(board, load_protocol(PROTOCOL).wiring, "random", seed=3)
    box = {"name": "sim-rat", "animal": "SIM-R", "seed": 5}
    conn = vigil_run_with_animal(board, PROTOCOL, animal, 0.2, box, tmp_path)
    stored = conn.execute("SELECT count(*), count(DISTINCT device_seq) FROM events WHERE kind = 'input'").fetchone()
    rewarded = conn.execute("SELECT count(*) FROM trials WHERE rewarded = 1").fetchone()[0]
    lever = board.output_log(1)
    presses = [c for c in board.inputs if c.channel == 1 and c.level]
    print(f"\nthe animal made {animal.edges} edges; {stored[0]} stored, {rewarded} rewarded trials, "
          f"{len(board.pulses_us(7))} pellets on the pin")  # fmt: skip
    # Every edge stored once; only a last falling edge may come after the session's end and be
    # missing (a switch opens 0.1-0.3 s after its press, a head leaves the magazine later).
    assert presses and rewarded > 0 and stored[0] == stored[1]
    missing = board.inputs[stored[0] :]
    assert len(missing) <= 1 and all(c is board.inputs[-1] and not c.level for c in missing), missing
    # Physics of the box (EmulatedBox): a press only while the lever's pin is high.
    for press in presses:
        level = [c.level for c in lever if c.cycle <= press.cycle]
        assert level and level[-1] == 1
