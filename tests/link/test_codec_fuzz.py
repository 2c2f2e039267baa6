"""100,000 bad lines of many shapes: no crash, none accepted, every one counted."""

from __future__ import annotations

import binascii

import numpy as np

from server.link.codec import MAX_LINE, REASONS, Decoder, encode
from server.link.messages import Ack, Beat, DriveCommand, Edge, PulseCommand, ReplayCommand

LINES = 100_000
CHUNK = 64 * 1024
PRINTABLE = np.arange(0x20, 0x7F, dtype=np.uint8)


def valid_lines(rng: np.random.Generator, n: int) -> list[bytes]:
    """Well-formed lines of both sides, to be damaged."""
    out = []
    for i in range(n):
        a, b = (int(x) for x in rng.integers(1, 2**32, 2))
        kind = i % 6
        if kind == 0:
            msg = Edge(a, int(rng.integers(0, 256)), bool(i & 8), b)
        elif kind == 1:
            msg = Beat(a, b, int(rng.integers(0, 65536)), i)
        elif kind == 2:
            msg = Ack(a, b, "ok", i, 0)
        elif kind == 3:
            msg = DriveCommand(a, int(rng.integers(0, 256)), bool(i & 8))
        elif kind == 4:
            msg = PulseCommand(a, int(rng.integers(0, 256)), int(rng.integers(1, 65536)))
        else:
            msg = ReplayCommand(a, b)
        out.append(encode(msg)[:-1])
    return out


def random_bytes(rng, n, lo, hi, alphabet=None) -> list[bytes]:
    lengths = rng.integers(lo, hi + 1, n)
    if alphabet is None:
        pool = rng.integers(0, 256, int(lengths.sum()), dtype=np.uint8)
        pool[pool == 0x0A] = 0x0B  # no line ends inside a line
    else:
        pool = rng.choice(alphabet, int(lengths.sum()))
    blob = pool.tobytes()
    ends = np.cumsum(lengths)
    return [blob[e - k : e] for e, k in zip(ends.tolist(), lengths.tolist())]


def damaged(rng, lines: list[bytes]) -> list[bytes]:
    """One byte changed to another printable byte: a CRC-16 catches every such error."""
    out = []
    for line, pos, new in zip(lines, rng.integers(0, 10**6, len(lines)), rng.choice(PRINTABLE, len(lines))):
        pos = int(pos) % len(line)
        if line[pos] == new:
            new = 0x21 if new != 0x21 else 0x22
        out.append(line[:pos] + bytes([new]) + line[pos + 1 :])
    return out


def truncated(rng, lines: list[bytes]) -> list[bytes]:
    return [ln[: int(k) % (len(ln) - 1) + 1] for ln, k in zip(lines, rng.integers(0, 10**6, len(lines)))]


def right_crc_wrong_grammar(rng, lines: list[bytes]) -> list[bytes]:
    """Bodies broken in their grammar, then sealed with a correct CRC: the syntax layer's job."""
    breakers = [
        lambda f: [b"0" + f[0], *f[1:]],  # leading zero
        lambda f: [f[0], f[1], b"4294967296", *f[3:]],  # beyond 32 bits
        lambda f: [*f, b"7"],  # extra field
        lambda f: f[:-1],  # missing field
        lambda f: [f[0], f[1].upper(), *f[2:]],  # verbs are lower case
        lambda f: [f[0], f[1], b"", *f[2:]],  # double space
        lambda f: [f[0], f[1], b"-" + f[2], *f[3:]],  # signed number
    ]
    out = []
    for line, which in zip(lines, rng.integers(0, len(breakers), len(lines))):
        fields = line.rsplit(b" ", 1)[0].split(b" ")
        body = b" ".join(breakers[int(which)](fields))
        out.append(body + b" %04X" % binascii.crc_hqx(body, 0xFFFF))
    return out


def garbage_lines(seed: int = 20240611) -> list[bytes]:
    rng = np.random.default_rng(seed)
    share = LINES // 8
    good = valid_lines(rng, share)
    random_printable_bodies = random_bytes(rng, share, 1, 60, PRINTABLE)
    lines = (
        random_bytes(rng, share, 1, 120)  # any byte values
        + random_bytes(rng, share, 1, 80, PRINTABLE)  # printable noise
        + damaged(rng, good)
        + truncated(rng, good)
        + right_crc_wrong_grammar(rng, good)
        + [b + b" %04X" % binascii.crc_hqx(b, 0xFFFF) for b in random_printable_bodies]
        + random_bytes(rng, share, MAX_LINE + 1, 4 * MAX_LINE, PRINTABLE)  # overlong
    )
    lines += random_bytes(rng, LINES - len(lines), 0, 40)  # the rest: short, some empty
    order = rng.permutation(len(lines))
    return [lines[i] for i in order]


def test_hundred_thousand_bad_lines_are_all_counted_and_none_accepted():
    lines = garbage_lines()
    assert len(lines) == LINES and not any(b"\n" in ln for ln in lines)
    stream = b"\n".join(lines) + b"\n"
    decoder = Decoder(None)  # either side's verbs: the strictest test of "never acted on"
    accepted = []
    for start in range(0, len(stream), CHUNK):
        accepted.extend(decoder.feed(stream[start : start + CHUNK]))
        assert decoder.buffered <= MAX_LINE
    assert accepted == []
    assert decoder.accepted == 0
    assert decoder.rejected_total == LINES
    assert set(decoder.rejected) <= set(REASONS)
    # Every layer of defence was exercised, not only the CRC.
    for reason in (
        "empty",
        "overlong",
        "non_ascii",
        "no_crc",
        "bad_crc",
        "bad_syntax",
        "unknown_verb",
    ):
        assert decoder.rejected[reason] > 0, reason


def test_valid_lines_still_pass_after_a_flood_of_garbage():
    decoder = Decoder("device")
    decoder.feed(b"\n".join(garbage_lines(seed=7)[:5000]))  # no final LF: a partial line waits
    good = Edge(99, 4, False, 123)
    assert decoder.feed(b"\n" + encode(good)) == [good]
