"""Online estimate of what an animal has learned, updated after every trial.

An exact Bayesian filter on a parameter grid: after each choice every grid point's weight
is multiplied by the probability that point gave the choice, then every point's values
are updated by the model's own `learn`, the same function the offline fit uses. Exact
for static parameters, honest about uncertainty, and cheap enough (well under a
millisecond) to run inside the session after every trial. Optionally the posterior over
log beta diffuses between trials, so a drift in engagement (satiety, fatigue) is tracked.

Per-animal state is plain JSON (`state_dict` / `from_state`); the next session starts from
the last posterior, broadened by tempering, and `replay` rebuilds it bit for bit from the
stored trials. No clocks and no I/O here: the caller passes each trial in.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from .choice import get_choice_model
from .grid import build_grid, drift_kernel

STATE_FORMAT = 1
LOG_FLOOR = -1000.0  # weights below e^-1000 of the best are zero in double precision
_TIE = 1e-12


@dataclass(frozen=True, slots=True)
class ParamEstimate:
    mean: float
    low: float  # 2.5 % posterior quantile
    high: float  # 97.5 % posterior quantile


@dataclass(frozen=True, slots=True)
class Estimate:
    """The estimator's view after a trial (or before the first one).

    `best` is the option with the highest posterior-mean value (None while values tie);
    `exploration` is the predicted probability of not choosing it next; `p_prefers[x]` is
    the posterior probability that the animal values x above every other option.
    """

    model: str
    session_trial: int
    params: dict[str, ParamEstimate]
    values: dict[str, float]
    p_choice: dict[str, float]
    prediction_error: float | None
    surprise: float | None  # -log predicted probability of the last choice
    best: str | None
    exploration: float | None
    p_prefers_best: float | None
    p_prefers: dict[str, float]
    reward_rate: float | None

    def to_dict(self) -> dict[str, Any]:
        return {
            "model": self.model,
            "session_trial": self.session_trial,
            "params": {k: {"mean": v.mean, "low": v.low, "high": v.high}
                       for k, v in self.params.items()},
            "values": dict(self.values),
            "p_choice": dict(self.p_choice),
            "prediction_error": self.prediction_error,
            "surprise": self.surprise,
            "best": self.best,
            "exploration": self.exploration,
            "p_prefers_best": self.p_prefers_best,
            "p_prefers": dict(self.p_prefers),
            "reward_rate": self.reward_rate,
        }


def _normalise(logw: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """Normalised log weights (floored), the weights themselves, and the log normaliser."""
    top = float(logw.max())
    lse = top + math.log(float(np.exp(logw - top).sum()))
    out = np.maximum(logw - lse, LOG_FLOOR)
    return out, np.exp(out), lse  # weights always exp(log weights): state is logw alone


class OnlineEstimator:
    """Grid posterior over one choice model's parameters, with per-point values.

    model: a choice model name. options: labels known up front (more may appear later).
    grid: points per parameter axis (defaults as declared). drift: sd of the random walk of
    log beta per trial (0 = static). temper: weight kept by earlier sessions' evidence at
    each new session (1 = none lost). carry_values: keep values across sessions.
    reward_rate_step: step of the exponential filter on reward per trial.
    """

    def __init__(self, model: str = "q_learning", options: Sequence[str] = (), *,
                 grid: Mapping[str, int] | None = None, drift: float = 0.0,
                 temper: float = 0.5, carry_values: bool = False, q0: float = 0.0,
                 reward_rate_step: float = 0.1, use_prior: bool = True):
        self.model = get_choice_model(model)
        for label in options:
            if not isinstance(label, str) or not label:
                raise ValueError(f"option labels must be non-empty strings, got {label!r}")
        if len(set(options)) != len(options):
            raise ValueError("option labels must be distinct")
        if not (math.isfinite(drift) and drift >= 0):
            raise ValueError(f"drift must be a number >= 0, got {drift!r}")
        if not (0 < temper <= 1):
            raise ValueError(f"temper must be in (0, 1], got {temper!r}")
        if not (0 < reward_rate_step <= 1):
            raise ValueError(f"reward_rate_step must be in (0, 1], got {reward_rate_step!r}")
        self.config = {
            "grid": dict(grid or {}), "drift": float(drift), "temper": float(temper),
            "carry_values": bool(carry_values), "q0": float(q0),
            "reward_rate_step": float(reward_rate_step), "use_prior": bool(use_prior),
        }
        self.grid = build_grid(self.model, grid, use_prior)
        self._kernel = drift_kernel(self.grid, drift)
        self._beta_axis = self.grid.axis_of("beta")
        self._choice_axes = self.grid.choice_axes
        self.options: list[str] = list(options)
        self._index = {lab: i for i, lab in enumerate(self.options)}
        self._logw = self.grid.log_prior.copy()
        self._w = np.exp(self._logw)  # always exp(self._logw)
        self._q = np.full((len(self.options),) + self.grid.qshape, self.config["q0"])
        self._ones = (1,) * len(self.grid.qshape)
        self._previous: int | None = None
        self._session_trial = 0
        self._rate_sum = 0.0  # bias-corrected exponential filter (numerator)
        self._rate_norm = 0.0
        self._last_pe: float | None = None
        self._last_surprise: float | None = None
        self._p: np.ndarray | None = None  # next trial's choice probabilities per point
        self._shifted = self._log_norm = None

    # ------------------------------------------------------------------ trial by trial

    def update(self, choice: str | None, reward: float, *, summarise: bool = True) -> Estimate | None:
        """Take one finished trial (choice label, or None for an omission) and its reward.

        With summarise=False the posterior is updated but no Estimate is built (the caller
        asks for `estimate()` only when it needs one: rehearsal of many animals)."""
        reward = float(reward)
        if not math.isfinite(reward):
            raise ValueError(f"reward must be a finite number, got {reward!r}")
        if choice is None or choice == "":
            self._last_pe = self._last_surprise = None
        else:
            self._choose(self._option(choice), reward)
        step = self.config["reward_rate_step"]
        self._rate_sum = (1 - step) * self._rate_sum + step * reward
        self._rate_norm = (1 - step) * self._rate_norm + step
        self._session_trial += 1
        if self._kernel is not None:
            self._diffuse()
        return self.estimate() if summarise else None

    def _option(self, label: str) -> int:
        idx = self._index.get(label)
        if idx is None:
            if not isinstance(label, str):
                raise ValueError(f"choice must be an option label or None, got {label!r}")
            idx = self._index[label] = len(self.options)
            self.options.append(label)
            pad = np.full((1,) + self._q.shape[1:], self.config["q0"])
            self._q = np.concatenate([self._q, pad], axis=0)
            self._p = None
        return idx

    def _choose(self, idx: int, reward: float) -> None:
        self._log_probs()
        lp = self._shifted[idx] - self._log_norm
        joint = self._logw + lp
        self._logw, self._w, log_pred = _normalise(joint)
        self._last_surprise = -log_pred
        chosen = self._one_hot(idx)
        self._q, delta = self.model.learn(self.grid.theta, self._q, chosen, reward)
        w_learn = self._w.sum(axis=self._choice_axes, keepdims=True)
        self._last_pe = float((w_learn * delta).sum())
        self._previous = idx
        self._p = None

    def _log_probs(self) -> None:
        """Softmax for the next trial at every grid point (cached until values change).

        Kept as shifted logits and log normaliser, so log P of one option costs one
        subtraction and never underflows.
        """
        if self._p is None:
            logits = self.model.drive(self.grid.theta, self._q, self._one_hot(self._previous))
            self._shifted = logits - logits.max(0)
            e = np.exp(self._shifted)
            total = e.sum(0)
            self._log_norm = np.log(total)
            self._p = e / total

    def _one_hot(self, idx: int | None) -> np.ndarray:
        out = np.zeros((len(self.options),) + self._ones)
        if idx is not None:
            out[idx] = 1.0
        return out

    def _diffuse(self) -> None:
        w = self._w
        sizes = self.grid.sizes
        b = self._beta_axis
        before, after = int(np.prod(sizes[:b])), int(np.prod(sizes[b + 1:]))
        # The kernel is column-stochastic, so the moved weights still sum to one: renormalise
        # against rounding and take one log, instead of a log-sum-exp round trip.
        moved = (self._kernel @ w.reshape(before, sizes[b], after)).reshape(sizes)
        moved /= moved.sum()
        with np.errstate(divide="ignore"):
            self._logw = np.maximum(np.log(moved), LOG_FLOOR)
        self._w = np.exp(self._logw)  # weights are always exp(log weights): state is logw alone

    # ------------------------------------------------------------------ summaries

    def estimate(self) -> Estimate:
        w = self._w
        params = {p.name: ParamEstimate(*row)
                  for p, row in zip(self.model.params, self.grid.marginal_summaries(w))}
        k = len(self.options)
        values, p_choice, p_prefers = {}, {}, {}
        best = exploration = p_best = None
        if k:
            w_learn = w.sum(axis=self._choice_axes, keepdims=True).ravel()
            q_mean = self._q.reshape(k, -1) @ w_learn
            self._log_probs()
            probs = self._p.reshape(k, -1) @ w.ravel()
            top = self._q >= self._q.max(0) - _TIE
            share = (top / top.sum(0)).reshape(k, -1) @ w_learn
            values = dict(zip(self.options, q_mean.tolist()))
            # sums of weights can overshoot 1 by a rounding step; keep them probabilities
            p_choice = dict(zip(self.options, np.clip(probs, 0.0, 1.0).tolist()))
            p_prefers = dict(zip(self.options, np.clip(share, 0.0, 1.0).tolist()))
            order = np.argsort(-q_mean, kind="stable")
            if k == 1 or q_mean[order[0]] - q_mean[order[1]] > _TIE:
                best = self.options[int(order[0])]
                exploration = 1.0 - p_choice[best]
                p_best = p_prefers[best]
        rate = self._rate_sum / self._rate_norm if self._rate_norm else None
        return Estimate(
            self.model.name, self._session_trial, params, values, p_choice,
            self._last_pe, self._last_surprise, best, exploration, p_best, p_prefers, rate,
        )

    def p_choice_at_least(self, label: str, level: float) -> float | None:
        """Posterior probability that the animal's next-trial probability of choosing
        `label` is at least `level`: how sure we are that it clearly prefers that option."""
        idx = self._index.get(label)
        if idx is None:
            return None
        self._log_probs()
        return float(np.clip(((self._p[idx] >= level) * self._w).sum(), 0.0, 1.0))

    # ------------------------------------------------------------------ sessions and state

    def new_session(self) -> None:
        """Start the next session: broaden the posterior, reset values and history."""
        prior = self.grid.log_prior
        self._logw, self._w, _ = _normalise(
            prior + self.config["temper"] * (self._logw - prior))
        if not self.config["carry_values"]:
            self._q = np.full(self._q.shape, self.config["q0"])
        self._previous = None
        self._session_trial = 0
        self._rate_sum = self._rate_norm = 0.0
        self._last_pe = self._last_surprise = None
        self._p = None

    def state_dict(self) -> dict[str, Any]:
        """Everything needed to continue later, as JSON-ready data (floats round-trip)."""
        return {
            "format": STATE_FORMAT,
            "model": self.model.name,
            "options": list(self.options),
            "config": {**self.config, "grid": dict(self.config["grid"])},
            "log_weights": self._logw.ravel().tolist(),
            "values": self._q.ravel().tolist(),
            "previous": self._previous,
            "session_trial": self._session_trial,
            "reward_rate": [self._rate_sum, self._rate_norm],
            "last": [self._last_pe, self._last_surprise],
        }

    @classmethod
    def from_state(cls, state: Mapping[str, Any]) -> "OnlineEstimator":
        """Rebuild an estimator exactly as `state_dict` left it."""
        if state.get("format") != STATE_FORMAT:
            raise ValueError(f"estimator state format {state.get('format')!r} is not "
                             f"{STATE_FORMAT}")
        est = cls(state["model"], state["options"], **state["config"])
        logw = np.array(state["log_weights"], dtype=float)
        q = np.array(state["values"], dtype=float)
        if logw.size != est._logw.size or q.size != est._q.size:
            raise ValueError("estimator state does not match its grid")
        est._logw = logw.reshape(est._logw.shape)
        est._w = np.exp(est._logw)
        est._q = q.reshape(est._q.shape)
        est._previous = state["previous"]
        est._session_trial = int(state["session_trial"])
        est._rate_sum, est._rate_norm = (float(x) for x in state["reward_rate"])
        est._last_pe, est._last_surprise = state["last"]
        return est

    @classmethod
    def replay(cls, trials: Iterable[tuple[Any, str | None, float]],
               state: Mapping[str, Any] | None = None,
               **config: Any) -> tuple["OnlineEstimator", list[Estimate]]:
        """Rebuild from stored (session, choice, reward) trials in order.

        Starts from `state` (the end of an earlier session) or fresh from `config`; a new
        session begins whenever the session key changes (and at once when resuming from a
        state), exactly as the live session core would have called `new_session`.
        """
        est = cls.from_state(state) if state is not None else cls(**config)
        current: list[Any] = [] if state is None else [object()]
        out = []
        for session, choice, reward in trials:
            if current and current[0] != session:
                est.new_session()
            current[:] = [session]
            out.append(est.update(choice, reward))
        return est, out
