"""The lab config: which boxes exist, which animal and protocol each runs, and the hard caps.

Read with the same marked-YAML reader as protocols, so its errors name file:line:col too.
Protocols named by a box are loaded and validated here, before anything starts.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from server.engine.caps import HardCaps
from server.protocol.load import load_protocol
from server.protocol.marked import Mark, Marked, load_marked
from server.protocol.model import Protocol
from server.protocol.problems import InvalidFile, Problem
from server.protocol.reader import Reader, did_you_mean


def _url_handlers():
    """pyserial's URL handlers (modules serial.urlhandler.protocol_<scheme>)."""
    import pkgutil

    import serial.urlhandler

    return [m for m in pkgutil.iter_modules(serial.urlhandler.__path__) if m.name.startswith("protocol_")]

TOP_KEYS = ("lab", "database", "caps", "boxes")
BOX_KEYS = ("name", "animal", "protocol", "port", "emulate", "seed")
EMULATE_KEYS = ("agent", "seed", "options", "faults")
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
    options: dict[str, Any] = field(default_factory=dict)
    faults: dict[str, float] = field(default_factory=dict)  # keys of FAULT_RANGES


@dataclass(frozen=True)
class BoxConfig:
    name: str
    animal: str
    protocol: Protocol
    port: str | None = None
    emulate: Emulation | None = None
    seed: int | None = None  # session seed; drawn fresh (and stored) when absent


@dataclass(frozen=True)
class LabConfig:
    source: str
    lab: str
    database: Path
    caps: HardCaps
    boxes: tuple[BoxConfig, ...]


def load_lab(path: str | Path) -> LabConfig:
    """Load a lab config and every protocol it names; InvalidFile lists all problems."""
    path = Path(path)
    file = str(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InvalidFile([Problem(Mark(file, 1, 1), f"cannot read lab config: {exc}")]) from None
    root, problems = load_marked(text, file)
    if root is None:
        raise InvalidFile(problems)
    reader = _LabReader(path.parent)
    reader.problems.extend(problems)
    lab = reader.lab(root, file)
    if reader.problems or lab is None:
        raise InvalidFile(reader.problems)
    return lab


class _LabReader(Reader):
    def __init__(self, base: Path):
        super().__init__()
        self.base = base
        self._protocols: dict[Path, Protocol | None] = {}

    def lab(self, root: Marked, file: str) -> LabConfig | None:
        top = self.mapping(root, "lab config", TOP_KEYS, required=("boxes",))
        if top is None:
            return None
        name = self.text(top["lab"], "lab") if "lab" in top else "lab"
        database = self.base / (self.text(top["database"], "database") or "") if "database" in top else Path("vigil.sqlite")
        caps = self.caps(top.get("caps"))
        boxes: list[BoxConfig] = []
        seen: dict[str, int] = {}
        animals: dict[str, str] = {}
        nodes = self.listing(top.get("boxes"), "boxes")
        if "boxes" in top and top["boxes"].is_list and not nodes:
            self.error(top["boxes"].mark, "boxes: needs at least one box")
        for i, node in enumerate(nodes):
            box = self.box(node, f"boxes[{i + 1}]")
            if box is None:
                continue
            if box.name in seen:
                self.error(node.mark, f"boxes[{i + 1}].name: box '{box.name}' is already listed as boxes[{seen[box.name]}]")
            elif box.animal in animals:
                self.error(node.mark, f"boxes[{i + 1}].animal: '{box.animal}' is already in box '{animals[box.animal]}'")
            else:
                seen[box.name] = i + 1
                animals[box.animal] = box.name
                boxes.append(box)
        return LabConfig(file, name or "lab", database, caps, tuple(boxes))

    def caps(self, node: Marked | None) -> HardCaps:
        f = self.mapping(node, "caps", ("max_rewards", "max_minutes"))
        if not f:
            return HardCaps()
        default = HardCaps()
        rewards = self.number(f["max_rewards"], "caps.max_rewards", low=0, integer=True) if "max_rewards" in f else default.max_rewards
        minutes = self.number(f["max_minutes"], "caps.max_minutes", low=0, low_open=True, high=24 * 60) if "max_minutes" in f else default.max_minutes
        return HardCaps(int(rewards if rewards is not None else default.max_rewards), float(minutes or default.max_minutes))

    def box(self, node: Marked, where: str) -> BoxConfig | None:
        before = len(self.problems)
        f = self.mapping(node, where, BOX_KEYS, required=("name", "animal", "protocol"))
        if f is None:
            return None
        name = self.text(f.get("name"), f"{where}.name")
        animal = self.text(f.get("animal"), f"{where}.animal")
        protocol = self.protocol(f.get("protocol"), f"{where}.protocol")
        port = self.port(f["port"], f"{where}.port") if "port" in f else None
        emulate = self.emulation(f["emulate"], f"{where}.emulate") if "emulate" in f else None
        if ("port" in f) == ("emulate" in f):
            self.error(node.mark, f"{where}: give exactly one of 'port' (a serial port) or 'emulate' (a virtual animal)")
        seed = self.number(f["seed"], f"{where}.seed", low=0, integer=True) if "seed" in f else None
        if len(self.problems) > before or name is None or animal is None or protocol is None:
            return None
        return BoxConfig(name, animal, protocol, port, emulate, int(seed) if seed is not None else None)

    def protocol(self, node: Marked | None, where: str) -> Protocol | None:
        rel = self.text(node, where)
        if rel is None:
            return None
        path = (self.base / rel).resolve()
        if path not in self._protocols:
            if not path.is_file():
                assert node is not None
                self.error(node.mark, f"{where}: no protocol file at {rel}")
                self._protocols[path] = None
                return None
            try:
                self._protocols[path] = load_protocol(path)
            except InvalidFile as exc:
                self.problems.extend(exc.problems)
                self._protocols[path] = None
        return self._protocols[path]

    def emulation(self, node: Marked, where: str) -> Emulation | None:
        from hardware_stubs.agents import AGENTS, AgentError, make_agent

        f = self.mapping(node, where, EMULATE_KEYS, required=("agent",))
        if f is None:
            return None
        agent = self.choice(f.get("agent"), f"{where}.agent", sorted(AGENTS))
        seed = self.number(f["seed"], f"{where}.seed", low=0, integer=True) if "seed" in f else 0
        options: dict[str, Any] = {}
        for key, value, _ in self.items(f.get("options"), f"{where}.options"):
            options[key] = value.value
        if agent is not None and "options" in f:
            try:
                make_agent(agent, **options)
            except AgentError as exc:
                self.error(f["options"].mark, f"{where}.options: {exc}")
                return None
        faults = self.faults(f.get("faults"), f"{where}.faults")
        if agent is None or seed is None or faults is None:
            return None
        return Emulation(agent, int(seed), options, faults)

    def faults(self, node: Marked | None, where: str) -> dict[str, float] | None:
        f = self.mapping(node, where, FAULT_RANGES)
        if f is None:
            return {} if node is None else None
        faults: dict[str, float] = {}
        bad = False
        for key, (low, high, low_open) in FAULT_RANGES.items():
            if key in f:
                value = self.number(f[key], f"{where}.{key}", low=low, high=high, low_open=low_open)
                bad = bad or value is None
                faults[key] = float(value or 0.0)
        if bad:
            return None
        if ("unplug_every_s" in faults) != ("unplug_for_s" in faults):
            self.error(node.mark, f"{where}: give both unplug_every_s and unplug_for_s, or neither")
            return None
        if faults.get("unplug_for_s", 0.0) >= faults.get("unplug_every_s", 1.0):
            self.error(f["unplug_for_s"].mark, f"{where}.unplug_for_s: expected less than unplug_every_s ({faults['unplug_every_s']:g}), found {faults['unplug_for_s']:g}")
            return None
        return faults

    def port(self, node: Marked, where: str) -> str | None:
        """A device path, or a pyserial URL whose scheme this pyserial knows."""
        text = self.text(node, where)
        if text is None or "://" not in text:
            return text
        scheme = text.split("://", 1)[0]
        known = sorted(m.name.removeprefix("protocol_") for m in _url_handlers())
        if scheme not in known:
            self.error(node.mark, f"{where}: unknown serial URL scheme '{scheme}' (pyserial knows {', '.join(known)}){did_you_mean(scheme, known)}")
            return None
        return text
