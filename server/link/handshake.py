"""The handshake check: does the device on this port speak our protocol and carry the wiring
the session's protocol expects? Pure; every problem is named at once, before a session starts.
"""

from __future__ import annotations

from server.link.messages import PROTOCOL_VERSION, UNKNOWN_KIND_PREFIX, Channel, Identity
from server.protocol.wiring import Wiring


class LinkError(Exception):
    """A box link cannot be used (not answering, wrong device); a short lower-case message."""


class HandshakeError(LinkError):
    """The device answered, but does not fit the protocol's wiring or speaks another version."""

    def __init__(self, box: str, problems: list[str]):
        self.box = box
        self.problems = problems
        super().__init__(f"box '{box}': " + "; ".join(problems))


def _kind_words(kind: str) -> str:
    if kind.startswith(UNKNOWN_KIND_PREFIX):
        return f"a kind this vigil does not know ('{kind[len(UNKNOWN_KIND_PREFIX) :]}')"
    return f"a {kind}"


def _check(direction: str, lines, device: tuple[Channel, ...]) -> list[str]:
    have = {c.number: c.kind for c in device}
    problems = []
    for line in sorted(lines, key=lambda ln: ln.channel):
        found = have.get(line.channel)
        if found is None:
            problems.append(
                f"{direction} '{line.name}' ({line.kind}) is wired to channel {line.channel}, "
                f"which the device does not have"
            )
        elif found != line.kind:
            problems.append(
                f"{direction} '{line.name}' ({line.kind}) is wired to channel {line.channel}, "
                f"which is {_kind_words(found)} on the device"
            )
    return problems


def identity_problems(identity: Identity, wiring: Wiring) -> list[str]:
    """Why this device cannot run a protocol with this wiring ([] when it can).

    A version we do not speak stops the check: its channel map may mean something else.
    """
    if identity.version != PROTOCOL_VERSION:
        return [
            f"device '{identity.firmware}' speaks wire protocol version {identity.version}, "
            f"this vigil speaks version {PROTOCOL_VERSION}"
        ]
    return _check("input", wiring.inputs.values(), identity.inputs) + _check(
        "output", wiring.outputs.values(), identity.outputs
    )


def check_identity(box: str, identity: Identity, wiring: Wiring) -> None:
    """Raise HandshakeError listing every mismatch between device and wiring."""
    problems = identity_problems(identity, wiring)
    if problems:
        raise HandshakeError(box, problems)


def device_channels(wiring: Wiring) -> tuple[tuple[Channel, ...], tuple[Channel, ...]]:
    """The channel map a box wired exactly as the protocol says would report (inputs, outputs)."""
    inputs = {line.channel: line.kind for line in wiring.inputs.values()}
    outputs = {line.channel: line.kind for line in wiring.outputs.values()}
    return (
        tuple(Channel(n, k) for n, k in sorted(inputs.items())),
        tuple(Channel(n, k) for n, k in sorted(outputs.items())),
    )
