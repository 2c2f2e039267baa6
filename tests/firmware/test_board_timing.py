"""Timing done on the board, measured on its pins in simulated cycles (16 MHz): pulse widths,
debouncing, edge stamps, and the outputs' safe state when the host goes silent."""

from __future__ import annotations

import time

import serial

from hardware_stubs.simulated_board import FREQ_HZ
from server.link.codec import Decoder, encode
from server.link.messages import DriveCommand, Edge, Identity, PulseCommand, QueryCommand

US = FREQ_HZ // 1_000_000  # cycles per microsecond
FEEDER, SYNC, HOUSE_LIGHT, LEFT_LEVER = 7, 8, 5, 1  # README pin map


def open_port(board) -> tuple[serial.Serial, Decoder]:
    port = serial.serial_for_url(str(board.link), baudrate=115_200, timeout=0.05)
    decoder = Decoder("device")
    end = time.monotonic() + 3
    seen: list = []
    while not any(isinstance(m, Identity) for m in seen) and time.monotonic() < end:
        port.write(encode(QueryCommand(1, "iam")))  # PROTOCOL.md section 5: ask until it answers
        seen += decoder.feed(port.read(4096))
    assert any(isinstance(m, Identity) for m in seen), "no identity from the board"
    return port, decoder


def read_for(port, decoder, seconds: float) -> list:
    out, end = [], time.monotonic() + seconds
    while time.monotonic() < end:
        out += decoder.feed(port.read(4096))
    return out


def test_pulse_widths_on_the_pins_are_what_was_asked(board):
    port, decoder = open_port(board)
    asked = {FEEDER: 30, SYNC: 5}  # the example protocols' feeder and sync pulses
    for i in range(6):
        port.write(encode(PulseCommand(100 + 2 * i, FEEDER, asked[FEEDER])))
        port.write(encode(PulseCommand(101 + 2 * i, SYNC, asked[SYNC])))
        time.sleep(0.06)
    read_for(port, decoder, 0.1)
    for channel, ms in asked.items():
        widths = [w for _, w in board.pulses_us(channel)]
        print(f"\noutput {channel}: asked {ms} ms, measured {[round(w) for w in widths]} us")
        assert len(widths) == 6
        # The issue's bound, well inside PROTOCOL.md section 9 ("timed on the device, to within
        # one main-loop pass").
        assert all(abs(w - ms * 1000) <= 100 for w in widths), widths
    port.close()


def test_a_glitch_is_ignored_a_press_is_one_edge_stamped_at_its_first_change(board):
    port, decoder = open_port(board)
    t0 = board.script([
        (0, 1, True), (500, 1, False),                       # 0.5 ms glitch: no edge
        (20_000, 2, True), (23_000, 2, False),               # a 3 ms press: one edge each way
        (40_000, 4, True), (40_300, 4, False), (40_500, 4, True),  # bounce, then held
        (48_000, 4, False),
        (60_000, 3, True), (61_900, 3, False),               # 1.9 ms: still below 2 ms
    ])  # fmt: skip
    edges: list = []
    end = time.monotonic() + 3  # a busy machine may hold the lines back a while
    while len(edges) < 4 and time.monotonic() < end:
        edges += [m for m in read_for(port, decoder, 0.1) if isinstance(m, Edge)]
    edges += [m for m in read_for(port, decoder, 0.2) if isinstance(m, Edge)]  # and no more
    assert [(e.channel, e.rising) for e in edges] == [(2, True), (2, False), (4, True), (4, False)]
    assert [e.seq for e in edges] == [1, 2, 3, 4]
    # Device time of each edge against the pin script: README "Inputs are debounced on the
    # board (2 ms) and stamped in microseconds"; PROTOCOL.md section 9, the edge time is the
    # instant of the first change. One constant offset (the board's clock starts at its
    # setup) plus the pin-change interrupt's latency.
    script_us = [20_000, 23_000, 40_000, 48_000]
    offsets = [e.device_us - (t0 // US + s) for e, s in zip(edges, script_us)]
    print(f"\nedge stamp offsets against the pin script: {offsets} us")
    assert max(offsets) - min(offsets) <= 20
    assert edges[1].device_us - edges[0].device_us in range(2_990, 3_011)
    port.close()


def test_host_silence_turns_every_output_off_after_5_s(board):
    port, decoder = open_port(board)
    for cid, channel in enumerate((HOUSE_LIGHT, LEFT_LEVER, 3, 6, 9, 10), 200):
        port.write(encode(DriveCommand(cid, channel, True)))
    read_for(port, decoder, 0.2)
    on = {c.channel for c in board.outputs if c.level}
    assert on == {HOUSE_LIGHT, LEFT_LEVER, 3, 6, 9, 10}
    last_host_line = board.host_lines[-1]
    assert board.wait_for(lambda b: sum(1 for c in b.outputs if c.cycle > last_host_line + FREQ_HZ) >= 6, 7.0)
    offs = [c for c in board.outputs if c.cycle > last_host_line + FREQ_HZ]
    assert sorted(c.channel for c in offs) == [1, 3, 5, 6, 9, 10] and not any(c.level for c in offs)
    silent_s = (offs[0].cycle - last_host_line) / FREQ_HZ
    burst_us = (offs[-1].cycle - offs[0].cycle) / US
    print(f"\nall outputs off {silent_s:.5f} s after the host's last line (within {burst_us:.0f} us)")
    # PROTOCOL.md section 9: no valid host line for 5 s -> every output off (vproto.h
    # VP_HOST_SILENCE_US), to within a main-loop pass.
    assert 5.0 <= silent_s <= 5.001 and burst_us < 1000
    port.close()
