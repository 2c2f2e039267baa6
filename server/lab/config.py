"""The lab config: which boxes exist, which animal and protocol each runs, and the hard caps.

Read with the same marked-YAML reader as protocols, so its errors name file:line:col too.
Protocols named by a box are loaded and validated here, before anything starts.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from server.engine.caps import HardCaps
from server.lab.config_alarms import AlarmSettings, read_alarms
from server.lab.config_link import Emulation, read_emulation, read_port
from server.lab.config_subject import merged_subject, read_subject
from server.lab.config_web import WebSettings, read_web
from server.protocol.load import load_protocol
from server.protocol.marked import Mark, Marked, load_marked
from server.protocol.model import Protocol
from server.protocol.problems import InvalidFile, Problem
from server.protocol.reader import Reader, did_you_mean
from server.store.dialect import is_server_url
from server.store.lab_store import default_spool

TOP_KEYS = ("lab", "database", "spool", "caps", "subject", "boxes", "web", "alarms")
BOX_KEYS = ("name", "animal", "subject", "protocol", "stages", "settings", "port", "emulate", "seed")
STAGE_KEYS = ("protocol", "advance")
ADVANCE_KEYS = ("sessions", "min_accuracy", "min_trials", "min_rewards", "max_omission_rate")


@dataclass(frozen=True)
class Advance:
    """When an animal moves on from a stage: every condition set holds in each of the last
    `sessions` sessions at that stage."""

    sessions: int = 1
    min_accuracy: float | None = None  # fraction correct of the session's scored trials
    min_trials: int | None = None
    min_rewards: int | None = None
    max_omission_rate: float | None = None


@dataclass(frozen=True)
class Stage:
    protocol: Protocol
    advance: Advance | None  # None: the last stage, or one the animal stays on


@dataclass(frozen=True)
class BoxConfig:
    name: str
    animal: str
    protocol: Protocol  # with stages: the first stage's; the lab picks the current one
    port: str | None = None
    emulate: Emulation | None = None
    seed: int | None = None  # session seed; drawn fresh (and stored) when absent
    stages: tuple[Stage, ...] = ()
    settings: dict[str, float] = field(default_factory=dict)  # per-animal protocol settings
    # species, strain, sex, age, date_of_birth, genotype, description (config_subject.py)
    subject: dict[str, str] = field(default_factory=dict)


@dataclass(frozen=True)
class LabConfig:
    source: str
    lab: str  # the rig's name in a lab-wide store (shown on its tiles)
    database: Path | str  # a SQLite file, or a PostgreSQL URL (str)
    caps: HardCaps
    boxes: tuple[BoxConfig, ...]
    web: WebSettings = WebSettings()
    warnings: tuple[Problem, ...] = ()  # old spellings read, here and in its protocols
    alarms: AlarmSettings = AlarmSettings()
    spool: Path | None = None  # with a PostgreSQL URL: the rig's local spool (default beside the config)


def is_lab_config(path: str | Path) -> bool:
    """True for a file that reads as a lab config (a top-level `boxes` list), not a protocol."""
    try:
        root, _ = load_marked(Path(path).read_text(encoding="utf-8"), str(path))
    except (OSError, UnicodeDecodeError):
        return False
    return root is not None and root.is_mapping and "boxes" in root.value and "vigil_protocol" not in root.value


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
        database = self.database(top.get("database"))
        spool = None
        if "spool" in top:
            spool_text = self.text(top["spool"], "spool")
            if spool_text and is_server_url(spool_text):
                self.error(top["spool"].mark, "spool: is the rig's local SQLite file, not a server URL")
            elif spool_text:
                spool = self.base / spool_text
        caps = self.caps(top.get("caps"))
        lab_subject = read_subject(self, top.get("subject"), "subject")
        boxes: list[BoxConfig] = []
        seen: dict[str, int] = {}
        animals: dict[str, str] = {}
        nodes = self.listing(top.get("boxes"), "boxes")
        if "boxes" in top and top["boxes"].is_list and not nodes:
            self.error(top["boxes"].mark, "boxes: needs at least one box")
        for i, node in enumerate(nodes):
            box = self.box(node, f"boxes[{i + 1}]", lab_subject)
            if box is None:
                continue
            if box.name in seen:
                self.error(
                    node.mark, f"boxes[{i + 1}].name: box '{box.name}' is already listed as boxes[{seen[box.name]}]"
                )
            elif box.animal in animals:
                self.error(
                    node.mark, f"boxes[{i + 1}].animal: '{box.animal}' is already in box '{animals[box.animal]}'"
                )
            else:
                seen[box.name] = i + 1
                animals[box.animal] = box.name
                boxes.append(box)
        web = read_web(self, top.get("web"))
        protocols = [p for p in self._protocols.values() if p is not None]
        warnings = tuple(self.warnings) + tuple(w for p in protocols for w in p.warnings)
        if spool is None and is_server_url(database):
            spool = default_spool(name or "lab", self.base)
        alarms = read_alarms(self, top.get("alarms"))
        return LabConfig(
            file, name or "lab", database, caps, tuple(boxes), web, warnings=warnings, alarms=alarms, spool=spool
        )

    def database(self, node: Marked | None) -> Path | str:
        """A SQLite path (relative to the config) or a PostgreSQL URL, kept as written."""
        if node is None:
            return Path("vigil.sqlite")
        text = self.text(node, "database") or ""
        if is_server_url(text):
            return text
        if "://" in text:
            scheme = text.split("://", 1)[0]
            self.error(
                node.mark, f"database: '{scheme}://' is not a store vigil knows; use a file path or postgresql://"
            )
        return self.base / text

    def caps(self, node: Marked | None) -> HardCaps:
        f = self.mapping(node, "caps", ("max_rewards", "max_minutes"))
        if not f:
            return HardCaps()
        default = HardCaps()
        rewards = (
            self.number(f["max_rewards"], "caps.max_rewards", low=0, integer=True)
            if "max_rewards" in f
            else default.max_rewards
        )
        minutes = (
            self.number(f["max_minutes"], "caps.max_minutes", low=0, low_open=True, high=24 * 60)
            if "max_minutes" in f
            else default.max_minutes
        )
        return HardCaps(
            int(rewards if rewards is not None else default.max_rewards), float(minutes or default.max_minutes)
        )

    def box(self, node: Marked, where: str, lab_subject: dict[str, str]) -> BoxConfig | None:
        before = len(self.problems)
        f = self.mapping(node, where, BOX_KEYS, required=("name", "animal"))
        if f is None:
            return None
        name = self.text(f.get("name"), f"{where}.name")
        animal = self.text(f.get("animal"), f"{where}.animal")
        stages: tuple[Stage, ...] = ()
        if ("protocol" in f) == ("stages" in f):
            self.error(
                node.mark,
                f"{where}: give exactly one of 'protocol' or 'stages' (a list of protocols to advance through)",
            )
            protocol = None
        elif "protocol" in f:
            protocol = self.protocol(f.get("protocol"), f"{where}.protocol")
        else:
            stages = self.stages(f["stages"], f"{where}.stages")
            protocol = stages[0].protocol if stages else None
        settings = self.box_settings(
            f.get("settings"),
            f"{where}.settings",
            [protocol] if protocol and not stages else [s.protocol for s in stages],
        )
        port = read_port(self, f["port"], f"{where}.port") if "port" in f else None
        emulate = read_emulation(self, f["emulate"], f"{where}.emulate") if "emulate" in f else None
        if ("port" in f) == ("emulate" in f):
            self.error(
                node.mark, f"{where}: give exactly one of 'port' (a serial port) or 'emulate' (a virtual animal)"
            )
        seed = self.number(f["seed"], f"{where}.seed", low=0, integer=True) if "seed" in f else None
        subject = merged_subject(lab_subject, read_subject(self, f.get("subject"), f"{where}.subject"))
        if len(self.problems) > before or name is None or animal is None or protocol is None:
            return None
        return BoxConfig(
            name, animal, protocol, port, emulate, int(seed) if seed is not None else None, stages, settings, subject
        )

    def stages(self, node: Marked, where: str) -> tuple[Stage, ...]:
        items = self.listing(node, where)
        if node.is_list and not items:
            self.error(node.mark, f"{where}: needs at least one stage")
        stages = []
        for i, item in enumerate(items):
            here = f"{where}[{i + 1}]"
            f = self.mapping(item, here, STAGE_KEYS, required=("protocol",))
            if f is None:
                continue
            protocol = self.protocol(f.get("protocol"), f"{here}.protocol")
            advance = self.advance(f["advance"], f"{here}.advance") if "advance" in f else None
            if "advance" not in f and i + 1 < len(items):
                self.error(item.mark, f"{here}: every stage but the last needs 'advance' (when the animal moves on)")
            if protocol is not None:
                stages.append(Stage(protocol, advance))
        return tuple(stages) if len(stages) == len(items) else ()

    def advance(self, node: Marked, where: str) -> Advance | None:
        f = self.mapping(node, where, ADVANCE_KEYS)
        if f is None:
            return None
        if not (set(f) - {"sessions"}):
            self.error(node.mark, f"{where}: give at least one of {', '.join(ADVANCE_KEYS[1:])}")
            return None
        values: dict[str, float | None] = {}
        for key in ("sessions", "min_trials", "min_rewards"):
            if key in f:
                values[key] = self.number(f[key], f"{where}.{key}", low=1 if key == "sessions" else 0, integer=True)
        for key in ("min_accuracy", "max_omission_rate"):
            if key in f:
                values[key] = self.probability(f[key], f"{where}.{key}")
        if any(v is None for v in values.values()):
            return None
        counts = {
            k: int(v) for k, v in values.items() if v is not None and k in ("sessions", "min_trials", "min_rewards")
        }
        rates = {k: float(v) for k, v in values.items() if v is not None and k not in counts}
        return Advance(
            **counts, min_accuracy=rates.get("min_accuracy"), max_omission_rate=rates.get("max_omission_rate")
        )

    def box_settings(self, node: Marked | None, where: str, protocols: list[Protocol]) -> dict[str, float]:
        known = sorted({name for p in protocols for name in p.settings})
        settings: dict[str, float] = {}
        for name, value, key_mark in self.items(node, where):
            if name not in known:
                hint = did_you_mean(name, known) if known else "; its protocols declare no settings"
                self.error(key_mark, f"{where}: no protocol setting named '{name}'{hint}")
                continue
            number = self.number(value, f"{where}.{name}")
            if number is not None:
                settings[name] = float(number)
        return settings

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
