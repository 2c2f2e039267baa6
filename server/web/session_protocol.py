"""The protocol a stored session ran, when its file is still the one that ran.

The store keeps a session's protocol path and SHA-256, not the compiled protocol. The page
reads the file again for what only the protocol says (a rule's condition and hold, the
Pavlovian CS), and only when its hash still matches: an edited file would put words in the
session's mouth that it never ran.
"""

from __future__ import annotations

import functools
import hashlib
from pathlib import Path
from typing import Any

from server.protocol.load import parse_protocol
from server.protocol.model import Protocol, Rule
from server.protocol.problems import InvalidFile


@functools.lru_cache(maxsize=32)
def _read(path: str, sha256: str) -> Protocol | None:
    try:
        data = Path(path).read_bytes()
    except OSError:
        return None
    if hashlib.sha256(data).hexdigest() != sha256:
        return None
    try:
        return parse_protocol(data.decode("utf-8"), path, sha256=sha256)
    except (InvalidFile, UnicodeDecodeError):
        return None


def protocol_of(session: dict[str, Any]) -> Protocol | None:
    """The session's protocol, or None when its file is gone, changed or unreadable."""
    path, sha = session.get("protocol_path"), session.get("protocol_sha256")
    if not path or not sha:
        return None
    return _read(str(path), str(sha))


def rules_of(protocol: Protocol | None) -> dict[str, Rule]:
    return {} if protocol is None else {rule.name: rule for rule in protocol.rules}
