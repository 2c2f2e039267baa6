"""Agent options declared as data, so the lab config can validate them before a run."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass

from server.protocol.reader import did_you_mean


class AgentError(ValueError):
    """Bad agent name or options; `errors` holds every problem found, not just the first."""

    def __init__(self, errors: Iterable[str]) -> None:
        self.errors = tuple(errors)
        super().__init__("; ".join(self.errors))


@dataclass(frozen=True, slots=True)
class AgentOption:
    """One tunable of a virtual animal: a number in [low, high] or one of `choices`."""

    name: str
    default: float | str | None
    summary: str
    low: float | None = None
    high: float | None = None
    choices: tuple[str, ...] = ()

    def problem(self, agent: str, value: object) -> str | None:
        """Why `value` is not acceptable for this option, or None when it is."""
        where = f"trait {self.name!r} of agent {agent!r}"
        if self.choices:
            if isinstance(value, str) and value in self.choices:
                return None
            hint = did_you_mean(value, self.choices, aside=True) if isinstance(value, str) else ""
            return f"{where} must be one of {', '.join(self.choices)}, got {value!r}{hint}"
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            return f"{where} must be a number, got {value!r}"
        if (
            value != value
            or (self.low is not None and value < self.low)
            or (self.high is not None and value > self.high)
        ):
            return f"{where} must be between {self.low:g} and {self.high:g}, got {value!r}"
        return None


def resolve_options(
    agent: str, declared: tuple[AgentOption, ...], given: Mapping[str, object]
) -> tuple[dict[str, object], list[str]]:
    """Defaults overlaid with `given`; returns (values, every error found)."""
    by_name = {o.name: o for o in declared}
    values: dict[str, object] = {o.name: o.default for o in declared}
    errors: list[str] = []
    for key, value in given.items():
        option = by_name.get(key)
        if option is None:
            errors.append(f"unknown trait {key!r} for agent {agent!r}{did_you_mean(key, by_name, aside=True)}")
            continue
        problem = None if value is None and option.default is None else option.problem(agent, value)
        if problem:
            errors.append(problem)
        else:
            values[key] = float(value) if isinstance(value, int) and not option.choices else value
    return values, errors
