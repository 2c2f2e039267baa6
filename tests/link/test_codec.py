"""Wire codec: check values, round trips, chunking, rejection reasons, the spec's examples."""

from __future__ import annotations

import binascii
import re
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from server.link import codec
from server.link.codec import MAX_LINE, Decoder, crc16_ccitt_false, encode
from server.link.messages import (
    INPUT_KIND_CODES,
    OUTPUT_KIND_CODES,
    Ack,
    Beat,
    Channel,
    DriveCommand,
    Edge,
    Identity,
    PulseCommand,
    QueryCommand,
    ReplayCommand,
)
from server.protocol.wiring import INPUT_KINDS, OUTPUT_KINDS

SPEC = Path(__file__).resolve().parents[2] / "hardware_stubs" / "PROTOCOL.md"
U32 = 2**32 - 1


# ---------------------------------------------------------------- CRC check values


def test_crc16_ccitt_false_check_value():
    # CRC catalogue check value for CRC-16/CCITT-FALSE over ASCII "123456789": 0x29B1.
    assert crc16_ccitt_false(b"123456789") == 0x29B1


def test_crc_hqx_with_init_zero_is_xmodem():
    # Same polynomial from init 0 is CRC-16/XMODEM, check value 0x31C3 (CRC catalogue);
    # binascii.crc_hqx is that CRC with a caller-chosen start value (Python binascii docs).
    assert binascii.crc_hqx(b"123456789", 0) == 0x31C3


def test_crc_field_is_four_upper_hex_digits_of_the_body():
    line = encode(Edge(42, 3, True, 3000123456))
    body, crc = line.rstrip(b"\n").rsplit(b" ", 1)
    assert re.fullmatch(rb"[0-9A-F]{4}", crc)
    assert int(crc, 16) == binascii.crc_hqx(body, 0xFFFF)


# ---------------------------------------------------------------- strategies

u32 = st.integers(0, U32)
ids = st.integers(1, U32)
channel = st.integers(0, 255)


def channel_maps(kinds: tuple[str, ...]) -> st.SearchStrategy[tuple[Channel, ...]]:
    return st.lists(st.tuples(channel, st.sampled_from(kinds)), max_size=12, unique_by=lambda c: c[0]).map(
        lambda items: tuple(Channel(n, k) for n, k in sorted(items))
    )


device_messages = st.one_of(
    st.builds(
        Identity,
        seq=u32,
        firmware=st.from_regex(r"[A-Za-z0-9._-]{1,32}", fullmatch=True),
        version=st.integers(1, 255),
        boot=st.integers(0, 65535),
        inputs=channel_maps(INPUT_KINDS),
        outputs=channel_maps(OUTPUT_KINDS),
    ),
    st.builds(Edge, seq=st.integers(1, U32), channel=channel, rising=st.booleans(), device_us=u32),
    st.builds(Beat, seq=u32, device_us=u32, boot=st.integers(0, 65535), rx_rejected=u32),
    st.builds(
        Ack,
        seq=u32,
        command_id=ids,
        result=st.sampled_from(["ok", "lost", "no-channel", "bad-value"]),
        device_us=u32,
        value=u32,
    ),
)
host_commands = st.one_of(
    st.builds(DriveCommand, command_id=ids, channel=channel, on=st.booleans()),
    st.builds(PulseCommand, command_id=ids, channel=channel, ms=st.integers(1, 65535)),
    st.builds(QueryCommand, command_id=ids, topic=st.from_regex(r"[a-z]{1,8}", fullmatch=True)),
    st.builds(ReplayCommand, command_id=ids, from_seq=st.integers(1, U32)),
)


# ---------------------------------------------------------------- round trips


@given(device_messages)
def test_device_message_round_trip(msg):
    line = encode(msg)
    assert line.endswith(b"\n") and len(line) - 1 <= MAX_LINE
    decoder = Decoder("device")
    assert decoder.feed(line) == [msg]
    assert decoder.rejected_total == 0 and decoder.accepted == 1


@given(host_commands)
def test_host_command_round_trip(msg):
    line = encode(msg)
    # Every valid host line fits the firmware's 40-byte receive buffer (PROTOCOL.md s1).
    assert len(line) - 1 <= 33
    assert Decoder("host").feed(line) == [msg]


@given(st.lists(device_messages, max_size=20), st.data())
def test_arbitrary_chunk_boundaries_give_the_same_messages(msgs, data):
    stream = b"".join(encode(m) for m in msgs)
    cuts = sorted(data.draw(st.lists(st.integers(0, len(stream)), max_size=30)))
    decoder = Decoder("device")
    out = []
    for a, b in zip([0, *cuts], [*cuts, len(stream)]):
        out.extend(decoder.feed(stream[a:b]))
    assert out == msgs
    assert decoder.rejected_total == 0 and decoder.buffered == 0


@given(
    st.lists(
        st.one_of(device_messages, st.binary(max_size=300).filter(lambda b: b"\n" not in b)),
        max_size=20,
    )
)
@settings(max_examples=60)
def test_garbage_between_lines_costs_only_itself(items):
    stream = b"".join(encode(i) if not isinstance(i, bytes) else i + b"\n" for i in items)
    decoder = Decoder("device")
    assert decoder.feed(stream) == [i for i in items if not isinstance(i, bytes)]
    assert decoder.rejected_total == sum(isinstance(i, bytes) for i in items)


def test_merged_lines_in_one_chunk_and_byte_by_byte_agree():
    msgs = [Edge(n, 1 + n % 3, n % 2 == 0, 1000 * n) for n in range(1, 50)]
    stream = b"".join(encode(m) for m in msgs)
    whole = Decoder().feed(stream)
    one_by_one = Decoder()
    trickled = [m for i in range(len(stream)) for m in one_by_one.feed(stream[i : i + 1])]
    assert whole == trickled == msgs


def test_crlf_endings_are_accepted():
    line = encode(Beat(7, 123, 5, 0))
    assert Decoder().feed(line[:-1] + b"\r\n") == [Beat(7, 123, 5, 0)]


# ---------------------------------------------------------------- rejection reasons


def with_crc(body: bytes) -> bytes:
    return body + b" %04X\n" % binascii.crc_hqx(body, 0xFFFF)


@pytest.mark.parametrize(
    ("line", "reason"),
    [
        (b"\n", codec.EMPTY),
        (b"\r\n", codec.EMPTY),
        (with_crc(b"42 edge 3 + 3000123456")[:-6] + b" 77a1\n", codec.BAD_CRC),  # lower case
        (b"42 edge 3 + 3000123456 77A2\n", codec.BAD_CRC),
        (b"42 edge 3 + 3000123456\n", codec.NO_CRC),
        (b"42 edge 3 + 3000123456 77A\n", codec.NO_CRC),
        ("42 edge 3 + 30001234µ6 77A1\n".encode(), codec.NON_ASCII),
        (with_crc(b"42 wiggle 3"), codec.UNKNOWN_VERB),
        (with_crc(b"90211 set 5 1"), codec.WRONG_SIDE),  # a host line seen by the host: an echo
        (with_crc(b"42"), codec.BAD_SYNTAX),
        (with_crc(b"042 edge 3 + 3000123456"), codec.BAD_SYNTAX),  # leading zero
        (with_crc(b"42 edge 3 + 4294967296"), codec.BAD_SYNTAX),  # beyond 32 bits
        (with_crc(b"42 edge 256 + 1"), codec.BAD_SYNTAX),  # channel beyond 255
        (with_crc(b"42 edge 3 * 1"), codec.BAD_SYNTAX),
        (with_crc(b"42 edge 3 +  1"), codec.BAD_SYNTAX),  # double space
        (with_crc(b"42 edge 3 + 1 9"), codec.BAD_SYNTAX),  # extra field
        (with_crc(b"0 edge 3 + 1"), codec.BAD_SYNTAX),  # events are numbered from 1
        (with_crc(b"42 edge 3 + +1"), codec.BAD_SYNTAX),
        (with_crc(b"42 edge 3 + 1_0"), codec.BAD_SYNTAX),  # int() would take this
        (with_crc(b"42 ack 0 ok 1 0"), codec.BAD_SYNTAX),  # command ids start at 1
        (with_crc(b"42 ack 9 OK 1 0"), codec.BAD_SYNTAX),
        (with_crc(b"0 iam fw 0 1 - -"), codec.BAD_SYNTAX),  # version 0
        (with_crc(b"0 iam fw 1 65536 - -"), codec.BAD_SYNTAX),  # boot is 16-bit
        (with_crc(b"0 iam fw 1 1 2:lp,1:lp -"), codec.BAD_SYNTAX),  # numbers must increase
        (with_crc(b"0 iam fw 1 1 1:LP -"), codec.BAD_SYNTAX),
        (with_crc(b"0 iam f\tw 1 1 - -"), codec.BAD_SYNTAX),
        (b"9" * (MAX_LINE + 1) + b"\n", codec.OVERLONG),
    ],
)
def test_bad_lines_are_counted_by_reason(line, reason):
    decoder = Decoder("device")
    assert decoder.feed(line) == []
    assert decoder.rejected == {reason: 1}
    assert decoder.accepted == 0


@pytest.mark.parametrize(
    "body",
    [
        b"7 set 1 2",
        b"7 set 1",
        b"0 set 1 1",
        b"7 pulse 1 0",
        b"7 pulse 1 65536",
        b"7 ask IAM",
        b"7 ask abcdefghi",
        b"7 replay 0",
    ],
)
def test_bad_host_commands_are_rejected(body):
    decoder = Decoder("host")
    assert decoder.feed(with_crc(body)) == []
    assert decoder.rejected == {codec.BAD_SYNTAX: 1}


def test_longest_allowed_line_passes_and_one_more_byte_does_not():
    firmware = "f" * 32
    msg = Identity(U32, firmware, 255, 65535, (), tuple(Channel(n, "lever") for n in range(1, 24)))
    line = encode(msg)
    assert len(line) - 1 <= MAX_LINE
    assert Decoder().feed(line) == [msg]
    padded = b"x" * (MAX_LINE - len(line) + 2) + line  # now one byte over, before the LF
    decoder = Decoder()
    assert decoder.feed(padded) == [] and decoder.rejected == {codec.OVERLONG: 1}


def test_overlong_stream_is_not_buffered_and_reading_resumes_after_the_next_lf():
    decoder = Decoder()
    good = encode(Edge(1, 2, True, 5))
    for _ in range(1000):  # 1 MB with no line end
        assert decoder.feed(b"A" * 1000) == []
        assert decoder.buffered <= MAX_LINE
    assert decoder.feed(b"tail\n" + good) == [Edge(1, 2, True, 5)]
    assert decoder.rejected == {codec.OVERLONG: 1}


def test_last_rejected_keeps_a_short_sample_for_the_log():
    decoder = Decoder()
    decoder.feed(b"noise " * 30 + b"\n")
    assert decoder.last_rejected == (b"noise " * 30)[:80]


def test_unknown_kind_codes_survive_as_unknown():
    (msg,) = Decoder().feed(with_crc(b"3 iam vigil-x 1 9 1:lp,2:zz 4:qq"))
    assert msg.inputs == (Channel(1, "lever_press"), Channel(2, "unknown:zz"))
    assert msg.outputs == (Channel(4, "unknown:qq"),)
    assert Decoder().feed(encode(msg)) == [msg]


def test_either_side_decoder_reads_both_directions():
    lines = encode(Edge(1, 1, True, 9)) + encode(DriveCommand(5, 1, True))
    assert Decoder(None).feed(lines) == [Edge(1, 1, True, 9), DriveCommand(5, 1, True)]
    with pytest.raises(ValueError, match="unknown line source"):
        Decoder("box")  # type: ignore[arg-type]


def test_every_wiring_kind_has_a_distinct_two_letter_code():
    assert sorted(INPUT_KIND_CODES) == sorted(INPUT_KINDS)
    assert sorted(OUTPUT_KIND_CODES) == sorted(OUTPUT_KINDS)
    codes = [*INPUT_KIND_CODES.values(), *OUTPUT_KIND_CODES.values()]
    assert len(set(codes)) == len(codes) and all(re.fullmatch("[a-z]{2}", c) for c in codes)


# ---------------------------------------------------------------- encoding errors


@pytest.mark.parametrize(
    ("msg", "pattern"),
    [
        (Edge(0, 1, True, 0), r"seq out of range 1\.\.4294967295: 0"),
        (Edge(1, 256, True, 0), r"channel out of range 0\.\.255: 256"),
        (Beat(1, 2**32, 0, 0), r"device_us out of range"),
        (PulseCommand(1, 1, 0), r"pulse ms out of range 1\.\.65535: 0"),
        (DriveCommand(0, 1, True), r"command id out of range"),
        (QueryCommand(1, "Hello"), r"bad topic: 'Hello'"),
        (Ack(1, 1, "fine thanks", 0, 0), r"bad result"),
        (Identity(0, "fw id", 1, 0, (), ()), r"bad firmware id"),
        (Identity(0, "fw", 1, 0, (Channel(2, "lick"), Channel(2, "lick")), ()), r"must increase"),
        (Identity(0, "fw", 1, 0, (Channel(1, "pedal"),), ()), r"no wire code for kind: 'pedal'"),
        (Edge(1, True, True, 0), r"channel must be an integer"),  # type: ignore[arg-type]
    ],
)
def test_encode_refuses_out_of_range_fields(msg, pattern):
    with pytest.raises(ValueError, match=pattern):
        encode(msg)


def test_encode_refuses_what_is_not_a_message():
    with pytest.raises(TypeError, match="not a wire message: str"):
        encode("42 edge")  # type: ignore[arg-type]


# ---------------------------------------------------------------- the spec's own examples


def spec_example_lines() -> list[tuple[str, bytes]]:
    text = SPEC.read_text()
    blocks = re.findall(r"```wire\n(.*?)```", text, flags=re.S)
    return [(ln[:2], ln[3:].encode() + b"\n") for block in blocks for ln in block.splitlines() if ln]


def test_every_example_line_in_the_spec_is_valid_and_canonical():
    examples = spec_example_lines()
    assert {side for side, _ in examples} == {"d>", "h>"} and len(examples) >= 10
    for side, line in examples:
        decoder = Decoder("device" if side == "d>" else "host")
        (msg,) = decoder.feed(line)
        assert encode(msg) == line, line
