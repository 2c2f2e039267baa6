"""Put a session together with its learning-model estimator and rules.

The engine knows neither models nor rules (layers point one way), so the live lab, the
rehearsal and the benchmarks all build sessions here: one place, so what is rehearsed is
exactly what runs.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Mapping
from typing import Any

from server.engine.caps import HardCaps
from server.engine.session import Session
from server.protocol.model import Protocol
from server.rules.book import RuleBook


def estimator_config(protocol: Protocol) -> dict[str, Any]:
    assert protocol.estimator is not None
    return {"model": protocol.estimator.model, "options": list(protocol.options), "drift": protocol.estimator.drift}


def choice_trial_types(protocol: Protocol) -> set[str]:
    """Trial types whose trials feed the estimator (they offer a choice)."""
    return {t.name for t in protocol.trial_types.values() if any(step.choose for step in t.steps)}


def animal_estimator_state(conn: sqlite3.Connection, animal: str, protocol: Protocol) -> dict[str, Any] | None:
    """The animal's estimator state at the end of its earlier sessions of this protocol,
    rebuilt by replaying their stored choice trials (exactly the live updates, in order)."""
    if protocol.estimator is None:
        return None
    from server.models.estimator import OnlineEstimator

    types = choice_trial_types(protocol)
    rows = conn.execute(
        "SELECT t.session_id, t.choice, t.reward, t.trial_type FROM trials t JOIN sessions s ON s.id = t.session_id"
        " WHERE s.animal = ? AND s.protocol = ? AND s.end_reason IS NOT NULL AND t.interrupted = 0"
        " ORDER BY s.started_at, s.id, t.trial",
        (animal, protocol.name),
    ).fetchall()
    trials = [(sid, choice, reward) for sid, choice, reward, trial_type in rows if trial_type in types]
    if not trials:
        return None
    estimator, _ = OnlineEstimator.replay(trials, **estimator_config(protocol))
    return estimator.state_dict()


def make_estimator(protocol: Protocol, state: Mapping[str, Any] | None = None):
    """The protocol's estimator, continuing from an animal's stored state when given."""
    if protocol.estimator is None:
        return None
    from server.models.estimator import OnlineEstimator

    if state is not None:
        estimator = OnlineEstimator.from_state(state)
        estimator.new_session()
        return estimator
    return OnlineEstimator(**estimator_config(protocol))


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
