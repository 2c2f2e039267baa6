"""The embedded default lab for `vigil demo`: the example config's emulated boxes, repeated
with fresh names, animals and seeds when more boxes are asked for."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

from server.lab.config import LabConfig, load_lab
from server.lab.config_link import Emulation


def demo_lab(config_path: Path, boxes: int) -> LabConfig:
    lab = load_lab(config_path)
    templates = [b for b in lab.boxes if b.emulate is not None]
    made = []
    for i in range(boxes):
        base = templates[i % len(templates)]
        if i < len(templates):
            made.append(base)
            continue
        round_ = i // len(templates) + 1
        assert base.emulate is not None
        made.append(
            replace(
                base,
                name=f"{base.name}-{round_}",
                animal=f"{base.animal}-{round_}",
                emulate=Emulation(base.emulate.agent, base.emulate.seed + 1000 * round_, base.emulate.traits),
            )
        )
    return replace(lab, lab=f"{lab.lab} (demo)", boxes=tuple(made))
