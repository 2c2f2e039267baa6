"""Hard caps from the lab config. A protocol can only tighten them, never loosen them."""

from __future__ import annotations

from dataclasses import dataclass

from server.protocol.model import Limits


@dataclass(frozen=True, slots=True)
class HardCaps:
    max_rewards: int = 300
    max_minutes: float = 180.0


@dataclass(frozen=True, slots=True)
class EffectiveLimits:
    max_rewards: int
    max_minutes: float
    max_trials: int | None


def effective_limits(limits: Limits, caps: HardCaps) -> EffectiveLimits:
    """The stricter of the protocol's limits and the lab's caps, for each quantity."""
    rewards = caps.max_rewards if limits.max_rewards is None else min(limits.max_rewards, caps.max_rewards)
    minutes = caps.max_minutes if limits.max_minutes is None else min(limits.max_minutes, caps.max_minutes)
    return EffectiveLimits(rewards, minutes, limits.max_trials)
