"""Which online estimator a model gets, and rebuilding one from its state or stored trials.

The exact grid (`estimator.OnlineEstimator`) wherever it is exact and affordable: models of
up to `GRID_MAX_PARAMS` parameters, and any model whose beta drifts (the grid's walk is exact
there; the particle moves assume static parameters). Everything else, or `method="particles"`,
gets the resample-move particle filter (`particles.ParticleEstimator`). Both implement the
session's `TrialEstimator`, and their states say which they are.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import Any

from . import kernels_two_stage  # noqa: F401  (registers the two-stage models' kernels)
from .estimator import Estimate, OnlineEstimator, replay_into
from .kernels import KERNEL_FACTORIES, get_kernel
from .particles import METHOD, ParticleEstimator

GRID_MAX_PARAMS = 3
METHODS = ("auto", "grid", "particles")
AnyEstimator = OnlineEstimator | ParticleEstimator


def chosen_method(model: str, method: str = "auto", drift: float = 0.0) -> str:
    if method not in METHODS:
        raise ValueError(f"estimator method must be one of {', '.join(METHODS)}, got {method!r}")
    if method != "auto":
        return method
    if model in KERNEL_FACTORIES:  # built from a two-stage task: the hybrid and its variants
        return "particles"
    return "grid" if drift > 0 or len(get_kernel(model).params) <= GRID_MAX_PARAMS else "particles"


def make_online_estimator(model: str = "q_learning", options: Iterable[str] = (), *, method: str = "auto",
                          **config: Any) -> AnyEstimator:  # fmt: skip
    """A fresh estimator for `model`; `config` goes to the chosen class. A two-stage task's
    `states`, `second_options` and `task` go to the particle estimator only; the grid's
    single-stage models refuse two-stage trials when they come."""
    two_stage = {k: config.pop(k) for k in ("states", "second_options", "task") if k in config}
    if chosen_method(model, method, float(config.get("drift", 0.0))) == "grid":
        return OnlineEstimator(model, list(options), **config)
    return ParticleEstimator(model, list(options), **two_stage, **config)


def estimator_from_state(state: Mapping[str, Any]) -> AnyEstimator:
    """Either estimator, exactly as its `state_dict` left it (a clear error for an unknown one)."""
    if state.get("method") == METHOD:
        return ParticleEstimator.from_state(state)
    return OnlineEstimator.from_state(state)


def replay_estimator(trials: Iterable[tuple[Any, ...]], state: Mapping[str, Any] | None = None,
                     **config: Any) -> tuple[AnyEstimator, list[Estimate]]:  # fmt: skip
    """Rebuild from stored (session, choice, reward[, second stage]) trials: from `state` (the end of an
    earlier session) or fresh from `config`; a new session begins whenever the session key
    changes (and at once when resuming), exactly as the live session core calls `new_session`."""
    est = estimator_from_state(state) if state is not None else make_online_estimator(**config)
    return est, replay_into(est, trials, state is not None)
