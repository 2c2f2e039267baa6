"""How a box in the lab config reaches its hardware: a serial port, or an emulated box and its faults."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from server.protocol.marked import Marked
from server.protocol.reader import Reader, did_you_mean

EMULATE_KEYS = ("agent", "seed", "traits", "faults")
# Faults an emulated box can inject (hardware_stubs/box.py): key -> (low, high, low excluded).
FAULT_RANGES = {
    "unplug_every_s": (0.0, 24 * 3600.0, True),
    "unplug_for_s": (0.0, 3600.0, True),
    "drop_rate": (0.0, 0.5, False),
    "garbage_rate": (0.0, 0.5, False),
}


@dataclass(frozen=True)
class Emulation:
    agent: str
    seed: int
    traits: dict[str, Any] = field(default_factory=dict)  # the virtual animal's own parameters
    faults: dict[str, float] = field(default_factory=dict)  # keys of FAULT_RANGES


def _url_handlers():
    """pyserial's URL handlers (modules serial.urlhandler.protocol_<scheme>)."""
    import pkgutil

    import serial.urlhandler

    return [m for m in pkgutil.iter_modules(serial.urlhandler.__path__) if m.name.startswith("protocol_")]


def read_emulation(r: Reader, node: Marked, where: str) -> Emulation | None:
    from hardware_stubs.agents import AGENTS, AgentError, make_agent

    f = r.mapping(node, where, EMULATE_KEYS, required=("agent",), renamed={"options": "traits"})
    if f is None:
        return None
    agent = r.choice(f.get("agent"), f"{where}.agent", sorted(AGENTS))
    seed = r.number(f["seed"], f"{where}.seed", low=0, integer=True) if "seed" in f else 0
    traits: dict[str, Any] = {}
    for key, value, _ in r.items(f.get("traits"), f"{where}.traits"):
        traits[key] = value.value
    if agent is not None and "traits" in f:
        try:
            make_agent(agent, **traits)
        except AgentError as exc:
            r.error(f["traits"].mark, f"{where}.traits: {exc}")
            return None
    faults = read_faults(r, f.get("faults"), f"{where}.faults")
    if agent is None or seed is None or faults is None:
        return None
    return Emulation(agent, int(seed), traits, faults)


def read_faults(r: Reader, node: Marked | None, where: str) -> dict[str, float] | None:
    f = r.mapping(node, where, FAULT_RANGES)
    if f is None:
        return {} if node is None else None
    faults: dict[str, float] = {}
    bad = False
    for key, (low, high, low_open) in FAULT_RANGES.items():
        if key in f:
            value = r.number(f[key], f"{where}.{key}", low=low, high=high, low_open=low_open)
            bad = bad or value is None
            faults[key] = float(value or 0.0)
    if bad:
        return None
    assert node is not None  # mapping(None) is None
    if ("unplug_every_s" in faults) != ("unplug_for_s" in faults):
        r.error(node.mark, f"{where}: give both unplug_every_s and unplug_for_s, or neither")
        return None
    if faults.get("unplug_for_s", 0.0) >= faults.get("unplug_every_s", 1.0):
        r.error(
            f["unplug_for_s"].mark,
            f"{where}.unplug_for_s: expected less than unplug_every_s ({faults['unplug_every_s']:g}), "
            f"found {faults['unplug_for_s']:g}",
        )
        return None
    return faults


def read_port(r: Reader, node: Marked, where: str) -> str | None:
    """A device path, or a pyserial URL whose scheme this pyserial knows."""
    text = r.text(node, where)
    if text is None or "://" not in text:
        return text
    scheme = text.split("://", 1)[0]
    known = sorted(m.name.removeprefix("protocol_") for m in _url_handlers())
    if scheme not in known:
        r.error(
            node.mark,
            f"{where}: unknown serial URL scheme '{scheme}' "
            f"(pyserial knows {', '.join(known)}){did_you_mean(scheme, known)}",
        )
        return None
    return text
