"""The five-port box's image (make BOX=ports) on a simulated board: it names itself and its
channel map in the handshake, its pins are the README's, every input pin gives its own
channel's edge and every output channel drives its own pin, it goes safe on host silence as
the reference image does, and `vigil run` runs a five-port protocol on it with a virtual
animal working the pins."""

from __future__ import annotations

import asyncio
import re
import time

import pytest
import test_board_image as reference  # tests/firmware is on the import path under pytest
from test_board_animal import vigil_run_with_animal
from test_board_timing import open_port, read_for

from hardware_stubs.board_animal import BoardAnimal
from hardware_stubs.simulated_board import FREQ_HZ, HERE, BoardError, SimulatedBoard
from server.lab.supervisor import RUN_TIME_LIMIT
from server.link.codec import encode
from server.link.handshake import identity_problems
from server.link.messages import INPUT_KIND_CODES, OUTPUT_KIND_CODES, Channel, DriveCommand, Edge, Identity
from server.link.serial_link import SerialLink
from server.protocol.load import load_protocol

ROOT = HERE.parent
US = FREQ_HZ // 1_000_000

# The five-port box as its brief lists it (PROTOCOL.md channel numbers), written out here
# rather than read from channels_ports.c.
FIVE_PORT_INPUTS = ["nose_poke"] * 5 + ["head_entry", "pellet_sensor"]
FIVE_PORT_OUTPUTS = ["cue_light"] * 5 + ["house_light", "feeder", "sync", "cue_light", "tone"]
CENTRE, NORTH, SOUTH = 1, 4, 5  # inputs; west 2, east 3, magazine 6, pellet sensor 7
HOUSE_LIGHT, FEEDER, SYNC, TRAY_LIGHT, TONE = 6, 7, 8, 9, 10

# A trial in the shape of the two-stage task (centre poke to start, two side ports, then two
# further lit ports), every pellet earned: a scenario of our own for this box.
PROTOCOL = """\
vigil_protocol: 1
name: five-port start and two choices
about: A centre poke lights west and east; either lights north and south; either pays.
wiring:
  outputs:
    centre_light: {kind: cue_light, channel: 1}
    west_light: {kind: cue_light, channel: 2}
    east_light: {kind: cue_light, channel: 3}
    north_light: {kind: cue_light, channel: 4}
    south_light: {kind: cue_light, channel: 5}
    room_light: {kind: house_light, channel: 6}
    pellet: {kind: feeder, channel: 7, pulse_ms: 20}
    trial_mark: {kind: sync, channel: 8, pulse_ms: 5}
    tray_light: {kind: cue_light, channel: 9}
    tone: {kind: tone, channel: 10}
  inputs:
    centre: {kind: nose_poke, channel: 1, presented_by: centre_light}
    west: {kind: nose_poke, channel: 2, presented_by: west_light}
    east: {kind: nose_poke, channel: 3, presented_by: east_light}
    north: {kind: nose_poke, channel: 4, presented_by: north_light}
    south: {kind: nose_poke, channel: 5, presented_by: south_light}
    tray: {kind: head_entry, channel: 6}
    pellet_seen: {kind: pellet_sensor, channel: 7}
options:
  go_north: {input: north, reward_probability: 1.0}
  go_south: {input: south, reward_probability: 1.0}
at_start: {activate: room_light}
trial_types:
  start_then_two:
    steps:
      - step: start
        activate: [centre_light]
        pulse: trial_mark
        wait_s: 20
        respond: {centre: first}
        on_leave: {deactivate: [centre_light]}
      - step: first
        activate: [west_light, east_light]
        wait_s: 10
        respond: {west: second, east: second}
        on_leave: {deactivate: [west_light, east_light]}
      - step: second
        activate: [north_light, south_light]
        wait_s: 10
        choose: [go_north, go_south]
        if_rewarded: deliver
        if_unrewarded: end
        next: end
        on_leave: {deactivate: [north_light, south_light]}
      - step: deliver
        activate: [tray_light, tone]
        pulse: pellet
        wait_s: 1
        on_leave: {deactivate: [tray_light, tone]}
iti: {fixed: 0.5}
blocks:
  - block: only
    trial_types: [start_then_two]
limits: {max_minutes: 5, max_rewards: 100}
"""


def five_port_protocol(tmp_path):
    path = tmp_path / "five_port.yaml"
    path.write_text(PROTOCOL)
    return path


def readme_pins(title: str) -> dict[str, dict[int, str]]:
    """The pin table that follows `title` in the README's hardware section, as the harness
    reports a pin map: {"in": {1: "PD2", ...}, "out": {...}}."""
    text = (ROOT / "README.md").read_text()
    table = text[text.index(title) :].split("\n\n")[1]
    pins: dict[str, dict[int, str]] = {"in": {}, "out": {}}
    for row in table.splitlines()[2:]:
        cells = [c.strip() for c in row.strip().strip("|").split("|")]
        for label, name, pin in (("in", cells[0], cells[1]), ("out", cells[3], cells[4])):
            if name:
                pins[label][int(name.split()[0])] = re.fullmatch(r"[AD]\d+ / (P[BCD]\d)", pin).group(1)
    return pins


def test_the_image_fits_and_the_handshake_names_the_five_port_box(ports_build, ports_board, tmp_path):
    *_, size_report = ports_build
    program = int(re.search(r"Program:\s+(\d+) bytes", size_report).group(1))
    data = int(re.search(r"Data:\s+(\d+) bytes", size_report).group(1))
    print(f"\navr-size (five-port): program {program} B, data {data} B")
    assert program <= reference.FLASH_BYTES - reference.BOOTLOADER_BYTES
    assert data <= reference.SRAM_BYTES - reference.STACK_RESERVE
    wiring = load_protocol(five_port_protocol(tmp_path)).wiring

    async def greet() -> Identity:
        link = SerialLink("five", str(ports_board.link), wiring, time.monotonic, say=lambda s: None)
        identity = await link.connect()  # checks the wiring itself: a mismatch raises
        await link.close()
        return identity

    identity = asyncio.run(greet())
    assert identity.firmware == "vigil-ports-1.0" and identity.version == 1  # PROTOCOL.md section 10
    assert identity.inputs == tuple(Channel(n, k) for n, k in enumerate(FIVE_PORT_INPUTS, 1))
    assert identity.outputs == tuple(Channel(n, k) for n, k in enumerate(FIVE_PORT_OUTPUTS, 1))
    assert identity_problems(identity, wiring) == []
    # The example two-stage protocol is written for this box.
    two_stage = load_protocol(ROOT / "protocols" / "two_stage.yaml").wiring
    assert identity_problems(identity, two_stage) == []
    # A lever protocol is refused on this board, channel by channel ...
    lever_box = identity_problems(identity, load_protocol(ROOT / "protocols" / "reversal.yaml").wiring)
    assert "output 'lever_west' (lever) is wired to channel 1, which is a cue_light on the device" in lever_box
    assert "input 'trough' (head_entry) is wired to channel 3, which is a nose_poke on the device" in lever_box
    # ... and the five-port protocol on the reference board's map.
    kind_in = {c: k for k, c in INPUT_KIND_CODES.items()}
    kind_out = {c: k for k, c in OUTPUT_KIND_CODES.items()}
    ref_inputs = tuple(Channel(n, kind_in[c]) for n, c in enumerate(reference.REFERENCE_INPUTS, 1))
    ref_outputs = tuple(Channel(n, kind_out[c]) for n, c in enumerate(reference.REFERENCE_OUTPUTS, 1))
    on_reference = identity_problems(Identity(0, "vigil-ref-1.0", 1, 1, ref_inputs, ref_outputs), wiring)
    assert "input 'west' (nose_poke) is wired to channel 2, which is a lever_press on the device" in on_reference
    assert "output 'tray_light' (cue_light) is wired to channel 9, which is a aversive on the device" in on_reference


def test_both_boxes_pins_are_the_readmes(ports_board, board):
    assert ports_board.pins() == readme_pins("Pin map of the five-port box")
    assert board.pins() == readme_pins("Pin map of the reference box")
    assert len(ports_board.pins()["in"]) == 7 and len(board.pins()["in"]) == 8


def test_the_harness_takes_the_box_from_the_image_and_refuses_a_wrong_one(ports_build, board_build, tmp_path):
    harness, ports_hex, _ = ports_build
    ref_hex = board_build[1]
    with SimulatedBoard(harness, ports_hex, tmp_path / "a.tty") as board:  # no box named
        assert board.box == "ports" and len(board.pins()["in"]) == 7
    # Pins read with the wrong box's map would be silently wrong: the harness says so instead.
    with pytest.raises(BoardError, match=r"is not an image for box 'ports' \(no 'vigil-ports-1.0' in it\)"):
        SimulatedBoard(harness, ref_hex, tmp_path / "b.tty", box="ports")


@pytest.mark.parametrize("box", ["ports", "ref"])
def test_each_input_pin_is_its_channels_edge_and_each_output_channel_its_pin(box, request):
    """On both boxes' images: their pins are worked out from boxes.h at compile time."""
    board = request.getfixturevalue("ports_board" if box == "ports" else "board")
    pins = board.pins()
    n_in, n_out = len(pins["in"]), len(pins["out"])
    assert (n_in, n_out) == ((7, 10) if box == "ports" else (8, 10))
    port, decoder = open_port(board)
    # Inputs: a 5 ms poke on each channel in turn, 20 ms apart; one edge each way per channel.
    t0 = board.script([(k * 20_000 + d, ch, on) for k, ch in enumerate(range(1, n_in + 1))
                       for d, on in ((0, True), (5_000, False))])  # fmt: skip
    edges: list[Edge] = []
    end = time.monotonic() + 4
    while len(edges) < 2 * n_in and time.monotonic() < end:
        edges += [m for m in read_for(port, decoder, 0.1) if isinstance(m, Edge)]
    assert [(e.channel, e.rising) for e in edges] == [(ch, on) for ch in range(1, n_in + 1) for on in (True, False)]
    # Each stamped at its own pin's change (one offset: the board's clock starts at its setup).
    offsets = [e.device_us - (t0 // US + (e.channel - 1) * 20_000 + (0 if e.rising else 5_000)) for e in edges]
    assert max(offsets) - min(offsets) <= 20, offsets

    # Outputs: each channel on then off, one at a time; only that channel's pin moves.
    first = before = len(board.outputs)
    for ch in range(1, n_out + 1):
        for on in (True, False):
            port.write(encode(DriveCommand(100 + 2 * ch + on, ch, on)))
            end = time.monotonic() + 2
            while len(board.outputs) < before + 1 and time.monotonic() < end:
                read_for(port, decoder, 0.02)
            before += 1
    read_for(port, decoder, 0.1)
    moved = [(c.channel, c.level) for c in board.outputs[first:]]
    assert moved == [(ch, level) for ch in range(1, n_out + 1) for level in (1, 0)]
    port.close()


def test_host_silence_turns_the_five_port_boards_outputs_off(ports_board):
    # As on the reference image (vproto.h VP_HOST_SILENCE_US, PROTOCOL.md section 9): every
    # output off 5 s after the host's last line, to within a main-loop pass.
    board = ports_board
    port, decoder = open_port(board)
    lit = (CENTRE, NORTH, HOUSE_LIGHT, TRAY_LIGHT, TONE)
    for cid, ch in enumerate(lit, 300):
        port.write(encode(DriveCommand(cid, ch, True)))
    read_for(port, decoder, 0.2)
    assert {c.channel for c in board.outputs if c.level} == set(lit)
    last_host_line = board.host_lines[-1]
    assert board.wait_for(lambda b: sum(1 for c in b.outputs if c.cycle > last_host_line + FREQ_HZ) >= len(lit), 7.0)
    offs = [c for c in board.outputs if c.cycle > last_host_line + FREQ_HZ]
    assert sorted(c.channel for c in offs) == sorted(lit) and not any(c.level for c in offs)
    assert 5.0 <= (offs[0].cycle - last_host_line) / FREQ_HZ <= 5.001
    port.close()


def test_vigil_run_of_a_five_port_protocol_on_the_board(ports_board, tmp_path):
    board, protocol = ports_board, five_port_protocol(tmp_path)
    wiring = load_protocol(protocol).wiring
    animal = BoardAnimal(board, wiring, "random", seed=23, latency_s=0.25, irt_s=0.5, omission=0.0,
                         collect_s=0.3, eat_s=0.4, check_every_s=0.0)  # fmt: skip
    box = {"name": "sim-five", "animal": "FP-07", "seed": 17}
    conn = vigil_run_with_animal(board, protocol, animal, 0.2, box, tmp_path)
    ((session, ended),) = conn.execute("SELECT id, end_reason FROM sessions").fetchall()
    assert ended == RUN_TIME_LIMIT
    stored = conn.execute("SELECT name, value FROM events WHERE session_id = ? AND kind = 'input'"
                          " ORDER BY device_seq", (session,)).fetchall()  # fmt: skip
    name_of = {line.channel: line.name for line in wiring.inputs.values()}
    # Every edge the animal made on the pins is stored once, in each input's order (the last
    # may fall after the session's end). Across inputs, pins that change in the same instant
    # (a head entry taking the pellet off the sensor) are stored in the order the board's
    # interrupts saw them.
    for channel, name in name_of.items():
        made = [c.level for c in board.inputs if c.channel == channel]
        kept = [int(v) for n, v in stored if n == name]
        assert kept == made[: len(kept)] and len(made) - len(kept) <= 1, name
    assert len(board.inputs) - len(stored) <= 2
    assert {"centre", "tray", "pellet_seen"} <= {n for n, _ in stored}

    # The trial's course on the pins: after each centre poke, side pokes (west, east), then
    # far ones (north, south), never a far one first. (A busy host may leave a light on a
    # few milliseconds longer, time for a second poke of the same stage.)
    pokes = "".join(str(c.channel) for c in board.inputs if c.level and c.channel <= SOUTH)
    trials = re.findall(r"1[^1]*", pokes)
    assert pokes.startswith("1") and all(re.fullmatch(r"1([23]+[45]*)?", t) for t in trials), pokes
    # Pokes only into a lit port (the box's physics, on the board's own pins).
    for poke in (c for c in board.inputs if c.level and c.channel <= SOUTH):
        light = [c.level for c in board.output_log(poke.channel) if c.cycle <= poke.cycle]
        assert light and light[-1] == 1, poke

    rewarded = conn.execute("SELECT count(*) FROM trials WHERE session_id = ? AND rewarded = 1"
                            " AND choice IN ('go_north', 'go_south')", (session,)).fetchone()[0]  # fmt: skip
    started = conn.execute("SELECT count(*) FROM trials WHERE session_id = ?", (session,)).fetchone()[0]
    pellets = board.pulses_us(FEEDER)
    marks = board.pulses_us(SYNC)
    print(f"\nfive-port run: {started} trials, {rewarded} rewarded, {len(pellets)} pellets and "
          f"{len(marks)} trial marks on the pins, {len(stored)} edges stored")  # fmt: skip
    assert rewarded >= 2 and len(pellets) == rewarded == sum(1 for t in trials if re.search("[45]", t))
    assert all(abs(w - 20_000) <= 100 for _, w in pellets) and all(abs(w - 5_000) <= 100 for _, w in marks)
    assert len(marks) >= started  # one at the start of every trial (a last one may be open)
    # Magazine light and tone came on with every pellet; the house light stayed on.
    for ch in (TRAY_LIGHT, TONE):
        assert sum(c.level for c in board.output_log(ch)) == rewarded, ch
    assert [c.level for c in board.output_log(HOUSE_LIGHT)][:2] == [0, 1]
