"""Virtual animals for emulated boxes, chosen by name with options declared as data.

agent = make_agent("q_learner", alpha=0.2, beta=4.0)
errors = validate_agent("pavlovian", {"tracking": "sign"})   # [] when fine
"""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType

from hardware_stubs.agents.base import Agent, VirtualAnimal
from hardware_stubs.agents.draws import Draws
from hardware_stubs.agents.options import AgentError, AgentOption, resolve_options
from hardware_stubs.agents.pavlovian import PavlovianApproacher
from hardware_stubs.agents.responders import QLearner, RandomResponder
from hardware_stubs.agents.two_stage import TwoStageLearner
from server.protocol.reader import did_you_mean

AGENTS: Mapping[str, type[VirtualAnimal]] = MappingProxyType(
    {cls.name: cls for cls in (RandomResponder, QLearner, PavlovianApproacher, TwoStageLearner)}
)


def validate_agent(name: str, options: Mapping[str, object]) -> list[str]:
    """Every problem with an agent name and its options, as short messages ([] if none)."""
    cls = AGENTS.get(name)
    if cls is None:
        return [f"unknown agent {name!r}{did_you_mean(name, AGENTS, aside=True)}; known: {', '.join(AGENTS)}"]
    values, errors = resolve_options(name, cls.OPTIONS, options)
    return errors or cls.cross_check(values)


def make_agent(name: str, **options: object) -> VirtualAnimal:
    """A fresh agent (one per box); raises AgentError naming every bad name or option."""
    errors = validate_agent(name, options)
    if errors:
        raise AgentError(errors)
    return AGENTS[name](**options)


__all__ = [
    "AGENTS",
    "Agent",
    "AgentError",
    "AgentOption",
    "Draws",
    "PavlovianApproacher",
    "QLearner",
    "RandomResponder",
    "TwoStageLearner",
    "VirtualAnimal",
    "make_agent",
    "validate_agent",
]
