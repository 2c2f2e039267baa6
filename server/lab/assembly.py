"""Put a session together with its learning-model estimator and rules.

The engine knows neither models nor rules (layers point one way): it sees them only as the
`TrialEstimator` and `TrialRules` of server/engine/seams.py. The live lab, the rehearsal
and the benchmarks all build sessions here: one place, so what is rehearsed is exactly
what runs.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from server.engine.caps import HardCaps
from server.engine.session import Session
from server.models.online import AnyEstimator, estimator_from_state, make_online_estimator, replay_estimator
from server.protocol.model import Protocol
from server.rules.book import RuleBook
from server.store.dialect import Connection
from server.store.history import trial_history


def estimator_config(protocol: Protocol) -> dict[str, Any]:
    assert protocol.estimator is not None
    config: dict[str, Any] = {
        "model": protocol.estimator.model, "options": list(protocol.options), "drift": protocol.estimator.drift,
    }  # fmt: skip
    task = protocol.two_stage
    if task is not None:
        # labels in the protocol's order, and the structure as plain data for the kernel
        config["options"] = list(task.first)
        config["states"] = list(task.states)
        config["second_options"] = list(dict.fromkeys(o for s in task.states.values() for o in s.options))
        config["task"] = {
            "first": list(task.first),
            "states": {name: list(state.options) for name, state in task.states.items()},
            "transitions": {a: dict(row) for a, row in task.transitions.items()},
        }
    return config


def choice_trial_types(protocol: Protocol) -> set[str]:
    """Trial types whose trials feed the estimator (they offer a choice)."""
    return {t.name for t in protocol.trial_types.values() if any(step.choose for step in t.steps)}


def animal_estimator_state(conn: Connection, animal: str, protocol: Protocol) -> dict[str, Any] | None:
    """The animal's estimator state at the end of its earlier sessions of this protocol,
    rebuilt by replaying their stored choice trials (exactly the live updates, in order)."""
    if protocol.estimator is None:
        return None
    two_stage = protocol.two_stage is not None
    past = trial_history(
        conn, animals=[animal], protocol=protocol.name, trial_types=choice_trial_types(protocol),
        ended_sessions_only=True, whole_trials_only=True, two_stage=two_stage,
    )  # fmt: skip
    trials: list[tuple[Any, ...]] = [
        (p.session_id, p.choice, p.reward or 0.0, p.second) if two_stage else (p.session_id, p.choice, p.reward or 0.0)
        for p in past
    ]
    if not trials:
        return None
    estimator, _ = replay_estimator(trials, **estimator_config(protocol))
    return estimator.state_dict()


def make_estimator(protocol: Protocol, state: Mapping[str, Any] | None = None) -> AnyEstimator | None:
    """The protocol's estimator, continuing from an animal's stored state when given."""
    if protocol.estimator is None:
        return None
    if state is not None:
        estimator = estimator_from_state(state)
        estimator.new_session()
        return estimator
    return make_online_estimator(**estimator_config(protocol))


def build_session(
    protocol: Protocol,
    seed: int,
    caps: HardCaps = HardCaps(),
    *,
    log_events: bool = True,
    summarise_estimates: bool = True,
    estimator_state: Mapping[str, Any] | None = None,
    estimate: bool = True,
) -> Session:
    """A session with the protocol's estimator (unless `estimate` is off) and rules.

    The live lab keeps both switches on; rehearsal turns both off: no event log, and the
    estimate summarised only when a rule reads it.
    """
    return Session(
        protocol,
        seed,
        caps,
        log_events=log_events,
        summarise_estimates=summarise_estimates,
        estimator=make_estimator(protocol, estimator_state) if estimate else None,
        rules=RuleBook(protocol) if protocol.rules else None,
    )
