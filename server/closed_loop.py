"""Put a session together with its learning-model estimator and rules.

The engine knows neither models nor rules (layers point one way), so the live lab, the
rehearsal and the benchmarks all build sessions here: one place, so what is rehearsed is
exactly what runs.
"""

from __future__ import annotations

from typing import Any, Mapping

from server.engine.caps import HardCaps
from server.engine.session import Session
from server.protocol.model import Protocol
from server.rules.book import RuleBook


def make_estimator(protocol: Protocol, state: Mapping[str, Any] | None = None):
    """The protocol's estimator, continuing from an animal's stored state when given."""
    if protocol.estimator is None:
        return None
    from server.models.estimator import OnlineEstimator

    if state is not None:
        estimator = OnlineEstimator.from_state(state)
        estimator.new_session()
        return estimator
    return OnlineEstimator(protocol.estimator.model, list(protocol.options), drift=protocol.estimator.drift)


def build_session(
    protocol: Protocol,
    seed: int,
    caps: HardCaps = HardCaps(),
    *,
    log_events: bool = True,
    estimator_state: Mapping[str, Any] | None = None,
    estimate: bool = True,
) -> Session:
    estimator = make_estimator(protocol, estimator_state) if estimate else None
    session = Session(protocol, seed, caps, log_events=log_events, estimator=estimator)
    if protocol.rules:
        session.observers.append(RuleBook(protocol))
    return session
