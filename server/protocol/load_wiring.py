"""The wiring, output actions and choice options of a protocol file: what the rest refers to."""

from __future__ import annotations

from server.protocol.marked import Marked
from server.protocol.model import Option, OutputActions
from server.protocol.reader import Reader
from server.protocol.wiring import (
    HELD_OUTPUT_KINDS,
    INPUT_KINDS,
    OUTPUT_KINDS,
    PULSED_OUTPUT_KINDS,
    InputLine,
    OutputLine,
    Wiring,
)

ACTION_KEYS = ("activate", "deactivate", "pulse")


def read_wiring(r: Reader, node: Marked | None) -> Wiring | None:
    top = r.mapping(node, "wiring", ("outputs", "inputs"), required=("outputs", "inputs"))
    if top is None:
        return None
    outputs: dict[str, OutputLine] = {}
    channels: dict[int, str] = {}
    declared_held: list[str] = []
    for name, value, _ in r.items(top.get("outputs"), "wiring.outputs"):
        kind_node = value.value.get("kind") if value.is_mapping else None
        if kind_node is None or kind_node.value not in PULSED_OUTPUT_KINDS:
            declared_held.append(name)
        where = f"wiring.outputs.{name}"
        fields = r.mapping(value, where, ("kind", "channel", "pulse_ms"), required=("kind", "channel"))
        if fields is None:
            continue
        kind = r.choice(fields.get("kind"), f"{where}.kind", OUTPUT_KINDS)
        channel = _channel(r, fields.get("channel"), where, channels, name)
        pulse_ms = 0
        if "pulse_ms" in fields:
            pulse_ms = r.number(fields["pulse_ms"], f"{where}.pulse_ms", low=1, high=60_000, integer=True) or 0
            if kind in HELD_OUTPUT_KINDS:
                r.error(fields["pulse_ms"].mark, f"{where}.pulse_ms: only feeder and sync outputs are pulsed")
        elif kind in PULSED_OUTPUT_KINDS:
            r.error(value.mark, f"{where}: missing required key 'pulse_ms' for a {kind} output")
        if kind is not None and channel is not None:
            outputs[name] = OutputLine(name, kind, channel, int(pulse_ms))
        else:
            r.broken.add(name)
    inputs: dict[str, InputLine] = {}
    channels = {}
    for name, value, key_mark in r.items(top.get("inputs"), "wiring.inputs"):
        where = f"wiring.inputs.{name}"
        if name in outputs:
            r.error(key_mark, f"{where}: '{name}' is already an output name")
        fields = r.mapping(value, where, ("kind", "channel", "presented_by"), required=("kind", "channel"))
        if fields is None:
            continue
        kind = r.choice(fields.get("kind"), f"{where}.kind", INPUT_KINDS)
        channel = _channel(r, fields.get("channel"), where, channels, name)
        presented_by = None
        if "presented_by" in fields:
            presented_by = r.reference(fields["presented_by"], f"{where}.presented_by", declared_held, "held output")
        if kind is not None and channel is not None and (presented_by or "presented_by" not in fields):
            inputs[name] = InputLine(name, kind, channel, presented_by)
        else:
            r.broken.add(name)
    return Wiring(outputs, inputs)


def _channel(r: Reader, node: Marked | None, where: str, taken: dict[int, str], name: str) -> int | None:
    channel = r.number(node, f"{where}.channel", low=0, high=63, integer=True)
    if channel is None:
        return None
    if channel in taken:
        assert node is not None
        r.error(node.mark, f"{where}.channel: channel {channel} is already used by '{taken[channel]}'")
        return None
    taken[int(channel)] = name
    return int(channel)


def read_actions(
    r: Reader, node: Marked | None, where: str, wiring: Wiring | None, allowed: tuple[str, ...]
) -> OutputActions:
    fields = r.mapping(node, where, allowed) if node is not None else None
    if not fields or wiring is None:
        return OutputActions()
    return read_action_fields(r, fields, where, wiring)


def read_action_fields(r: Reader, fields: dict[str, Marked], where: str, wiring: Wiring) -> OutputActions:
    lists: dict[str, tuple[str, ...]] = {}
    for key in ACTION_KEYS:
        names: list[str] = []
        for item in r.listing(fields.get(key), f"{where}.{key}", allow_single=True):
            name = r.reference(item, f"{where}.{key}", wiring.outputs, "output")
            if name is None:
                continue
            pulsed = wiring.outputs[name].pulsed
            if key == "pulse" and not pulsed:
                r.error(item.mark, f"{where}.pulse: '{name}' is a held output; use activate/deactivate")
            elif key != "pulse" and pulsed:
                r.error(item.mark, f"{where}.{key}: '{name}' is a pulsed output; use pulse")
            else:
                names.append(name)
        lists[key] = tuple(names)
    return OutputActions(**lists)


def read_options(
    r: Reader, node: Marked | None, wiring: Wiring | None, first_stage: frozenset[str] = frozenset()
) -> dict[str, Option]:
    """The choice options; those in `first_stage` (a two-stage task's first choice) lead to a
    state instead of paying off, so they take no reward probability of their own."""
    options: dict[str, Option] = {}
    used: dict[str, str] = {}
    for label, value, _ in r.items(node, "options"):
        where = f"options.{label}"
        leads_on = label in first_stage
        required = ("input",) if leads_on else ("input", "reward_probability")
        fields = r.mapping(value, where, ("input", "reward_probability"), required=required)
        if fields is None or wiring is None:
            continue
        input_name = r.reference(fields.get("input"), f"{where}.input", wiring.inputs, "input")
        p: float | None = None
        if leads_on and "reward_probability" in fields:
            r.error(
                fields["reward_probability"].mark,
                f"{where}.reward_probability: '{label}' is a first-stage option; its outcome is decided "
                "in the state it leads to, so give reward probabilities to that state's options",
            )
            r.broken.add(label)
            continue
        if not leads_on:
            p = r.probability(fields.get("reward_probability"), f"{where}.reward_probability")
        if input_name is not None and input_name in used:
            r.error(
                fields["input"].mark,
                f"{where}.input: '{input_name}' already belongs to option '{used[input_name]}'",
            )
            continue
        if input_name is not None and (leads_on or p is not None):
            used[input_name] = label
            options[label] = Option(label, input_name, None if p is None else float(p))
        else:
            r.broken.add(label)
    return options
