"""The channel between the lab and its status page's process: one JSON object per line over a
local stream socket (a socketpair, one end in each process).

Lab -> page: `{"setup": {...}}` once (database, tokens, lab name: tokens travel here so they
never appear in the page process's command line), then `{"feed": {"t", "boxes"}}` whenever a
tile changed, and `{"answer": id, "status", ...}` for each control asked for.
Page -> lab: `{"ready": pid}` once serving, and `{"ask": id, "op", "session_id", "origin",
"text"}` for pause, resume, stop and annotate.

Lines rather than a framing of our own: both ends read them with asyncio's `readline`, and
a person can read them in a trace.
"""

from __future__ import annotations

import json
from typing import Any

# A feed of a few hundred boxes stays far below this; a longer line is a fault.
LINE_LIMIT = 4 * 1024 * 1024


class ChannelError(Exception):
    pass


# Compact, and strict: a NaN is not JSON and would fail at the other end.
JSON = json.JSONEncoder(separators=(",", ":"), allow_nan=False)


def encode(message: dict[str, Any]) -> bytes:
    return JSON.encode(message).encode("utf-8") + b"\n"


def decode(line: bytes) -> dict[str, Any]:
    try:
        message = json.loads(line)
    except (UnicodeDecodeError, ValueError):
        raise ChannelError(f"unreadable line: {line[:80]!r}") from None
    if not isinstance(message, dict):
        raise ChannelError(f"not an object: {line[:80]!r}")
    return message
