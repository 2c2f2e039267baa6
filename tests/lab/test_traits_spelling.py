"""A virtual animal's parameters are its `traits` (a protocol's choice `options` are another
thing); the old `options` spelling in a lab config or population file still loads, with a
warning that names `traits`."""

from __future__ import annotations

from pathlib import Path

from server.lab.config import load_lab
from server.lab.population import read_population

ROOT = Path(__file__).resolve().parents[2]

LAB = """\
lab: spelling check room
database: lab.sqlite
boxes:
  - name: shelf-1
    animal: RT-0901
    protocol: {protocol}
    emulate: {{agent: q_learner, seed: 5, {key}: {{alpha: 0.4, beta: 3.0}}}}
"""


def test_traits_in_a_lab_config_and_the_old_spelling(tmp_path):
    protocol = ROOT / "protocols" / "reversal.yaml"
    new, old = tmp_path / "new.yaml", tmp_path / "old.yaml"
    new.write_text(LAB.format(protocol=protocol, key="traits"))
    old.write_text(LAB.format(protocol=protocol, key="options"))
    a, b = load_lab(new), load_lab(old)
    assert a.boxes[0].emulate.traits == b.boxes[0].emulate.traits == {"alpha": 0.4, "beta": 3.0}
    assert a.warnings == ()
    (warning,) = b.warnings
    assert (warning.mark.line, warning.mark.col) == (7, 42)  # where "options" starts
    assert "'options' is now called 'traits'" in warning.message


def test_population_file_old_spelling():
    new = read_population("traits:\n  alpha: {uniform: [0.1, 0.5]}\n", "pop.yaml", "q_learner")
    old = read_population("options:\n  alpha: {uniform: [0.1, 0.5]}\n", "pop.yaml", "q_learner")
    assert new.spreads == old.spreads and new.warnings == ()
    (warning,) = old.warnings
    assert "'options' is now called 'traits'" in warning.message and warning.mark.line == 1
