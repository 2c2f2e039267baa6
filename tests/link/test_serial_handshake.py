"""Greeting a box: the identity check against the protocol's wiring (pure, then through a real
pty to an emulated box process and through the lab), ports given as pyserial URLs, a port
with nobody answering, and the USB-serial latency-timer warning."""

from __future__ import annotations

import asyncio
import time

import pytest
from test_pty_link import FR1  # tests/link is on the import path under pytest

from server.engine.caps import HardCaps
from server.lab.config import BoxConfig, LabConfig
from server.lab.supervisor import Lab, LabError
from server.link.emulator_process import EmulatorProcess, emulator_command
from server.link.handshake import HandshakeError, LinkError, device_channels, identity_problems
from server.link.latency_timer import latency_timer_ms, latency_warning
from server.link.messages import Channel, Identity
from server.link.serial_link import SerialLink
from server.protocol.load import load_protocol
from server.store.writer import Store

# Two boxes of our own: the lever box of the pty link test, and one with a nose-poke port.
LEVER_BOX = FR1
POKE_BOX = (LEVER_BOX.replace("name: continuous reinforcement check", "name: poke box")
            .replace("lever: {kind: lever, channel: 0}", "poke_light: {kind: cue_light, channel: 0}")
            .replace("press: {kind: lever_press, channel: 0, presented_by: lever}",
                     "poke: {kind: nose_poke, channel: 0, presented_by: poke_light}")
            .replace("magazine: {kind: head_entry, channel: 2}", "magazine: {kind: head_entry, channel: 4}")
            .replace("[room_light, lever]", "[room_light, poke_light]")
            .replace("input: press", "input: poke"))  # fmt: skip


@pytest.fixture(scope="module")
def protocols(tmp_path_factory):
    folder = tmp_path_factory.mktemp("protocols")
    (folder / "lever.yaml").write_text(LEVER_BOX)
    (folder / "pokes.yaml").write_text(POKE_BOX)
    return folder


@pytest.fixture(scope="module")
def poke_box(protocols):
    return load_protocol(protocols / "pokes.yaml")


@pytest.fixture(scope="module")
def lever_box(protocols):
    return load_protocol(protocols / "lever.yaml")


def identity_for(wiring, version: int = 1) -> Identity:
    inputs, outputs = device_channels(wiring)
    return Identity(0, "vigil-emu-1.0", version, 3, inputs, outputs)


# ---------------------------------------------------------------- pure check


def test_a_box_wired_as_the_protocol_passes(poke_box):
    assert identity_problems(identity_for(poke_box.wiring), poke_box.wiring) == []


def test_every_missing_or_different_channel_is_named(lever_box):
    wiring = lever_box.wiring  # lever 0, house light 4, feeder 5; press 0, magazine 2
    ident = Identity(0, "vigil-ref-1.0", 1, 3,
                     (Channel(0, "nose_poke"), Channel(2, "head_entry")),
                     (Channel(0, "lever"), Channel(5, "unknown:zz")))  # fmt: skip
    assert identity_problems(ident, wiring) == [
        "input 'press' (lever_press) is wired to channel 0, which is a nose_poke on the device",
        "output 'room_light' (house_light) is wired to channel 4, which the device does not have",
        "output 'pellet' (feeder) is wired to channel 5, which is a kind this vigil does not know ('zz') on the device",
    ]


def test_a_version_we_do_not_speak_is_refused_naming_both(poke_box):
    problems = identity_problems(identity_for(poke_box.wiring, version=2), poke_box.wiring)
    assert problems == ["device 'vigil-emu-1.0' speaks wire protocol version 2, this vigil speaks version 1"]


# ---------------------------------------------------------------- through a pty


@pytest.fixture
def poke_device(tmp_path, protocols):
    """An emulated box process carrying the poke box's wiring, linked in tmp_path."""
    path = tmp_path / "poke-box.tty"
    child = EmulatorProcess("poke-box", path, emulator_command(
        path, str(protocols / "pokes.yaml"), "random", 5))  # fmt: skip
    yield path
    child.stop()


def connect(url: str, wiring, **kw) -> Identity:
    async def go():
        link = SerialLink("box-7", url, wiring, time.monotonic, say=lambda s: None, **kw)
        try:
            return await link.connect(startup_s=15)
        finally:
            await link.close(0.2)

    return asyncio.run(go())


def test_the_wrong_box_is_refused_before_anything_is_driven(poke_device, lever_box):
    with pytest.raises(HandshakeError) as caught:
        connect(str(poke_device), lever_box.wiring)
    assert caught.value.problems == [
        "input 'press' (lever_press) is wired to channel 0, which is a nose_poke on the device",
        "input 'magazine' (head_entry) is wired to channel 2, which the device does not have",
        "output 'lever' (lever) is wired to channel 0, which is a cue_light on the device",
    ]
    assert str(caught.value).startswith("box 'box-7': input 'press' (lever_press)")


def test_a_pyserial_url_takes_the_same_path(poke_device, poke_box, tmp_path):
    log = tmp_path / "traffic.txt"
    ident = connect(f"spy://{poke_device}?file={log}", poke_box.wiring)
    assert (ident.inputs, ident.outputs) == device_channels(poke_box.wiring)
    traffic = log.read_text()  # the spy handler's hex dump: both directions went through it
    assert " TX " in traffic and " RX " in traffic and " iam vigil-emu-" in traffic


def test_lab_reports_a_mismatch_before_any_session_is_stored(poke_device, lever_box, tmp_path):
    box = BoxConfig("rack-9", "RN-9001", lever_box, port=str(poke_device))
    config = LabConfig("lab.yaml", "test lab", tmp_path / "lab.sqlite", HardCaps(), (box,))
    store = Store.open(tmp_path / "lab.sqlite")
    try:
        with pytest.raises(LabError, match=r"^box 'rack-9': input 'press' \(lever_press\)"):
            asyncio.run(Lab(config, store, say=lambda s: None).run(minutes=0.05))
        assert store.conn.execute("SELECT count(*) FROM sessions").fetchone()[0] == 0
    finally:
        store.close()


def test_a_port_nobody_answers_on_is_a_clear_error(poke_box):
    # loop:// echoes our own lines back (no descriptor: read by a thread); they are host
    # lines, never taken for the device's.
    with pytest.raises(LinkError, match=r"^box 'box-7' is not answering on loop:// "
                                        r"\(no identity within 1 s\)$"):  # fmt: skip
        connect("loop://", poke_box.wiring, greet_s=1.0)


def test_a_missing_port_is_a_clear_error(poke_box, tmp_path):
    async def go():
        link = SerialLink("box-7", str(tmp_path / "none.tty"), poke_box.wiring, time.monotonic)
        await link.connect(startup_s=0.2)

    with pytest.raises(LinkError, match=r"^box 'box-7': cannot open .*none\.tty: "):
        asyncio.run(go())


# ---------------------------------------------------------------- latency timer


def test_latency_timer_is_read_through_symlinks_and_warned_above_2_ms(tmp_path):
    sysfs = tmp_path / "sys"
    timer = sysfs / "bus" / "usb-serial" / "devices" / "ttyUSB3" / "latency_timer"
    timer.parent.mkdir(parents=True)
    timer.write_text("16\n")  # the common bridge default (DESIGN.md)
    dev = tmp_path / "ttyUSB3"
    dev.touch()
    by_id = tmp_path / "usb-Vigil_Box_07-if00"
    by_id.symlink_to(dev)
    assert latency_timer_ms(str(by_id), sysfs) == 16
    warning = latency_warning("rack-2", str(by_id), sysfs)
    assert warning is not None and "latency timer" in warning and "16 ms" in warning
    timer.write_text("1\n")
    assert latency_warning("rack-2", str(by_id), sysfs) is None
    assert latency_timer_ms("socket://localhost:7000", sysfs) is None
    assert latency_timer_ms(str(tmp_path / "pts-like"), sysfs) is None
