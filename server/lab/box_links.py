"""How the lab reaches each box: a serial link to its port, or to an emulated box.

An `emulate` box runs as a child process on a pseudo-terminal and is reached over serial,
exactly like a real box; `in_process` keeps it inside this process instead (tests).
"""

from __future__ import annotations

import asyncio
import re
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np

from server.engine.seams import BoxLink
from server.lab.config import BoxConfig
from server.link.emulator_process import EmulatorProcess, emulator_command
from server.link.inprocess import InProcessLink
from server.link.serial_link import SerialLink

EMULATOR_STARTUP_S = 30.0  # a child process importing numpy on a busy machine


class LabError(Exception):
    pass


def make_box(
    box: BoxConfig,
    clock: Callable[[], float],
    *,
    folder: Path | None = None,
    say: Callable[[str], None] = print,
    in_process: bool = False,
) -> BoxLink:
    """The link for one box: a serial link to its `port`, or for an `emulate` entry a serial
    link to an emulated box started as a child process on a pty in `folder`."""
    from hardware_stubs.agents import make_agent
    from hardware_stubs.emulated_box import EmulatedBox

    if box.port is not None:
        return SerialLink(box.name, box.port, box.protocol.wiring, clock, say=say)
    assert box.emulate is not None
    if not in_process:
        if folder is None:
            raise LabError(f"box '{box.name}': no folder for the emulated box's pty")
        path = folder / (re.sub(r"[^A-Za-z0-9._-]", "_", box.name) + ".tty")  # names are unique
        emu = box.emulate
        command = emulator_command(path, box.protocol.source, emu.agent, emu.seed, emu.traits, emu.faults)
        child = EmulatorProcess(box.name, path, command)
        return SerialLink(box.name, str(path), box.protocol.wiring, clock, say=say,
                          on_close=child.stop, gone=child.failure,
                          startup_s=EMULATOR_STARTUP_S)  # fmt: skip
    agent = make_agent(box.emulate.agent, **box.emulate.traits)
    emulated = EmulatedBox(box.protocol.wiring, agent, np.random.default_rng(box.emulate.seed))
    return InProcessLink(emulated, clock)


async def close_links(links: Sequence[BoxLink]) -> None:
    """Let every box go, each once its last commands are acknowledged (or time runs out)."""
    await asyncio.gather(*(link.close() for link in links), return_exceptions=True)
