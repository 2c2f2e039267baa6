"""Logical names for a box's inputs and outputs, and the kinds of hardware they stand for."""

from __future__ import annotations

from dataclasses import dataclass

# Held outputs are driven active/inactive; pulsed outputs fire for `pulse_ms` on the device.
HELD_OUTPUT_KINDS = ("lever", "cue_light", "house_light", "tone", "aversive")
PULSED_OUTPUT_KINDS = ("feeder", "sync")
OUTPUT_KINDS = HELD_OUTPUT_KINDS + PULSED_OUTPUT_KINDS

# Inputs arrive as edges; head entry and lick have meaningful offsets too.
INPUT_KINDS = ("lever_press", "head_entry", "nose_poke", "lick", "pellet_sensor")
# Inputs an animal works on (a choice or a schedule counts these).
OPERANT_INPUT_KINDS = ("lever_press", "nose_poke")


@dataclass(frozen=True, slots=True)
class OutputLine:
    name: str
    kind: str  # one of OUTPUT_KINDS
    channel: int
    pulse_ms: int = 0  # default pulse width for pulsed kinds

    @property
    def pulsed(self) -> bool:
        return self.kind in PULSED_OUTPUT_KINDS


@dataclass(frozen=True, slots=True)
class InputLine:
    name: str
    kind: str  # one of INPUT_KINDS
    channel: int
    # The held output that makes this input available (a lever's extension, the cue light
    # inside a nose-poke port); None when always available.
    presented_by: str | None = None


@dataclass(frozen=True, slots=True)
class Wiring:
    outputs: dict[str, OutputLine]
    inputs: dict[str, InputLine]

    def outputs_of_kind(self, kind: str) -> list[OutputLine]:
        return [o for o in self.outputs.values() if o.kind == kind]

    def inputs_of_kind(self, kind: str) -> list[InputLine]:
        return [i for i in self.inputs.values() if i.kind == kind]
