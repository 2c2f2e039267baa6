"""The reference firmware image fits the board, and the simulated board speaks the handshake
the host expects: protocol version and channel map."""

from __future__ import annotations

import asyncio
import re
import time

from hardware_stubs.simulated_board import HERE
from server.link.handshake import identity_problems
from server.link.messages import INPUT_KIND_CODES, OUTPUT_KIND_CODES, PROTOCOL_VERSION, Channel
from server.link.serial_link import SerialLink
from server.protocol.load import load_protocol

ROOT = HERE.parent

# ATmega328P datasheet, "Features": 32 KB flash (0.5 KB taken by a boot loader on Uno-class
# boards), 2 KB SRAM, 1 KB EEPROM.
FLASH_BYTES, BOOTLOADER_BYTES, SRAM_BYTES = 32 * 1024, 512, 2 * 1024
STACK_RESERVE = 512  # common practice: leave room for the stack and the ISRs' frames

# The README's pin map / channels.c, as wire kinds (PROTOCOL.md section 4).
REFERENCE_INPUTS = ["lp", "lp", "he", "np", "np", "lk", "ps", "np"]
REFERENCE_OUTPUTS = ["lv", "lv", "cl", "cl", "hl", "tn", "fd", "sy", "av", "cl"]
FITTING = ("reversal", "autoshaping", "lever_training_devaluation")


def test_the_image_fits_flash_and_ram_as_the_build_prints(board_build):
    *_, size_report = board_build
    program = int(re.search(r"Program:\s+(\d+) bytes", size_report).group(1))
    data = int(re.search(r"Data:\s+(\d+) bytes", size_report).group(1))
    print(f"\navr-size: program {program} B of {FLASH_BYTES - BOOTLOADER_BYTES} (flash less a "
          f"boot loader), data {data} B of {SRAM_BYTES} SRAM")  # fmt: skip
    assert program <= FLASH_BYTES - BOOTLOADER_BYTES
    assert data <= SRAM_BYTES - STACK_RESERVE


def test_handshake_reads_back_version_and_channel_map(board):
    kind_in = {c: k for k, c in INPUT_KIND_CODES.items()}
    kind_out = {c: k for k, c in OUTPUT_KIND_CODES.items()}

    async def greet():
        wiring = load_protocol(ROOT / "protocols" / "reversal.yaml").wiring
        link = SerialLink("sim", str(board.link), wiring, time.monotonic, say=lambda s: None)
        identity = await link.connect()
        await link.close()
        return identity

    identity = asyncio.run(greet())
    assert identity.version == PROTOCOL_VERSION == 1  # PROTOCOL.md section 10
    assert identity.firmware == "vigil-ref-1.0"
    assert identity.inputs == tuple(Channel(n, kind_in[c]) for n, c in enumerate(REFERENCE_INPUTS, 1))
    assert identity.outputs == tuple(Channel(n, kind_out[c]) for n, c in enumerate(REFERENCE_OUTPUTS, 1))
    # Every example protocol the README says fits the reference box passes the wiring check.
    for name in FITTING:
        wiring = load_protocol(ROOT / "protocols" / f"{name}.yaml").wiring
        assert identity_problems(identity, wiring) == [], name
    bandit = load_protocol(ROOT / "protocols" / "bandit.yaml").wiring
    assert identity_problems(identity, bandit)  # needs four lit ports: named, not accepted
