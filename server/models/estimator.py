"""Online estimate of what an animal has learned, updated after every trial.

An exact Bayesian filter on a parameter grid: after each choice every grid point's weight
is multiplied by the probability that point gave the choice, then every point's values
are updated by the model's own `learn`, the same function the offline fit uses. Exact
for static parameters, honest about uncertainty, and cheap enough (tens of microseconds)
to run inside the session after every trial. Optionally log beta drifts between trials
(`drift.BetaWalk`), so a change in engagement (satiety, fatigue) is tracked.

Weights are kept linear, normalised and floored (not as logs): a trial then costs a few
passes over the grid, which matters when a rehearsal runs a million trials. Two options
(the common case) take a shortcut: the choice probability is a logistic function of the
logit difference, which for the linear drives of `choice` is the drive of the value
differences, so one exponential per grid point is all a trial needs.

Per-animal state is plain JSON (`state_dict` / `from_state`); the next session starts from
the last posterior, broadened by tempering, and `replay` rebuilds it bit for bit from the
stored trials. No clocks and no I/O here: the caller passes each trial in.

One module of over 400 lines on purpose: update, summary, persistence and replay all work on
the same grid, weight and value arrays, and the two-option shortcut must stay next to the
general path it stands in for; split apart, every piece would reach into the others' arrays.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal, Protocol, TypedDict, overload

import numpy as np

from server.engine.records import SecondStage

from .choice import get_choice_model
from .drift import beta_walk
from .grid import build_grid
from .sums import dot, rows_dot

STATE_FORMAT = 2
# No weight falls below this: arithmetic stays out of slow subnormal numbers, and a grid
# point ruled out early can still come back if the animal changes.
WEIGHT_FLOOR = 1e-280
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
            "params": {k: {"mean": v.mean, "low": v.low, "high": v.high} for k, v in self.params.items()},
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


class EstimatorConfig(TypedDict):
    """The constructor's keyword arguments, as kept in the state (so from_state can pass them back)."""

    grid: dict[str, int]
    drift: float
    temper: float
    carry_values: bool
    q0: float
    reward_rate_step: float
    use_prior: bool


def _weights_from_logs(logw: np.ndarray) -> np.ndarray:
    """Normalised, floored weights from unnormalised log weights (a log-sum-exp round trip)."""
    top = float(logw.max())
    w = np.exp(logw - top)
    w *= 1.0 / float(w.sum())
    return np.maximum(w, WEIGHT_FLOOR, out=w)


class OnlineEstimator:
    """Grid posterior over one choice model's parameters, with per-point values.

    model: a choice model name. options: labels known up front (more may appear later).
    grid: points per parameter axis (defaults as declared). drift: sd of the random walk of
    log beta per trial (0 = static). temper: weight kept by earlier sessions' evidence at
    each new session (1 = none lost). carry_values: keep values across sessions.
    reward_rate_step: step of the exponential filter on reward per trial.
    """

    def __init__(
        self,
        model: str = "q_learning",
        options: Sequence[str] = (),
        *,
        grid: Mapping[str, int] | None = None,
        drift: float = 0.0,
        temper: float = 0.5,
        carry_values: bool = False,
        q0: float = 0.0,
        reward_rate_step: float = 0.1,
        use_prior: bool = True,
    ):
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
        self.config: EstimatorConfig = {
            "grid": dict(grid or {}),
            "drift": float(drift),
            "temper": float(temper),
            "carry_values": bool(carry_values),
            "q0": float(q0),
            "reward_rate_step": float(reward_rate_step),
            "use_prior": bool(use_prior),
        }
        self.grid = build_grid(self.model, grid, use_prior)
        self._walk = beta_walk(self.grid, drift)
        self._choice_axes = self.grid.choice_axes
        self.options: list[str] = list(options)
        self._index = {lab: i for i, lab in enumerate(self.options)}
        self._w = _weights_from_logs(self.grid.log_prior)
        self._scratch = np.empty(self.grid.sizes)  # weights x likelihood, without a walk
        self._work = np.empty(self.grid.sizes)
        self._q = np.full((len(self.options),) + self.grid.qshape, self.config["q0"])
        self._ones = (1,) * len(self.grid.qshape)
        self._previous: int | None = None
        self._session_trial = 0
        self._rate_sum = 0.0  # bias-corrected exponential filter (numerator)
        self._rate_norm = 0.0
        self._delta: np.ndarray | None = None  # last trial's errors, until the PE is asked for
        self._last_pe: float | None = None
        self._last_surprise: float | None = None
        self._hots: list[np.ndarray] | None = None
        self._forget()

    def _forget(self) -> None:
        """Drop what was derived from the values (they changed)."""
        self._gap: np.ndarray | None = None  # two options: logit(second) - logit(first) per point
        self._p: np.ndarray | None = None  # choice probabilities per option and point

    # ------------------------------------------------------------------ trial by trial

    @property
    def model_name(self) -> str:
        return self.model.name

    @overload
    def update(
        self,
        choice: str | None,
        reward: float,
        *,
        second: SecondStage | None = None,
        summarise: Literal[True] = True,
    ) -> Estimate: ...

    @overload
    def update(
        self, choice: str | None, reward: float, *, second: SecondStage | None = None, summarise: bool = True
    ) -> Estimate | None: ...

    def update(
        self, choice: str | None, reward: float, *, second: SecondStage | None = None, summarise: bool = True
    ) -> Estimate | None:
        """Take one finished trial (choice label, or None for an omission) and its reward.

        With summarise=False the posterior is updated but no Estimate is built (the caller
        asks for `estimate()` only when it needs one: rehearsal of many animals). `second`
        is a two-stage trial's second stage, which these single-stage models cannot use."""
        if second is not None:
            raise ValueError(f"model {self.model_name!r} learns single-stage choices, not two-stage trials")
        reward = float(reward)
        if not math.isfinite(reward):
            raise ValueError(f"reward must be a finite number, got {reward!r}")
        # the weights to carry into the next trial go where the walk (if any) takes them
        weighted = self._scratch if self._walk is None else self._walk.inbox
        if choice is None or choice == "":
            self._delta = self._last_pe = self._last_surprise = None
            if self._walk is not None:
                np.copyto(weighted, self._w)
                self._walk.settle(self._w, 1.0, WEIGHT_FLOOR)
        else:
            idx = self._option(choice)
            log_predictive, scale = self._weigh(idx, weighted)
            self._last_surprise = -log_predictive
            self._learn(idx, reward)
            if self._walk is not None:
                self._walk.settle(self._w, scale, WEIGHT_FLOOR)
            else:
                np.multiply(weighted, scale, out=self._w)
                np.maximum(self._w, WEIGHT_FLOOR, out=self._w)
        step = self.config["reward_rate_step"]
        self._rate_sum = (1 - step) * self._rate_sum + step * reward
        self._rate_norm = (1 - step) * self._rate_norm + step
        self._session_trial += 1
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
            self._forget()
        return idx

    def _weigh(self, idx: int, out: np.ndarray) -> tuple[float, float]:
        """out = weights x P(choice idx) per point, up to a constant; returns the log
        predictive probability of the choice and the factor that normalises `out`."""
        k = len(self.options)
        if k == 1:
            np.copyto(out, self._w)
        elif k == 2:
            # P(second) = 1 / (1 + exp(-gap)), P(first) = 1 / (1 + exp(gap))
            work = self._work
            gap = self._logit_gap()
            with np.errstate(over="ignore"):  # exp -> inf gives probability 0, as it should
                np.exp(gap if idx == 0 else np.negative(gap, out=work), out=work)
            work += 1.0
            np.divide(self._w, work, out=out)
        else:
            np.multiply(self._w, self._probs()[idx], out=out)
        total = float(out.sum())
        if total > 0.0:
            return math.log(total), 1.0 / total
        # every point all but excluded the choice (probabilities underflowed): redo in logs
        logits = self._logits()
        top = logits.max(0)
        log_p = logits[idx] - top - np.log(np.exp(logits - top).sum(0))
        joint = np.log(self._w) + log_p
        best = float(joint.max())
        np.exp(joint - best, out=out)
        total = float(out.sum())
        return math.log(total) + best, 1.0 / total

    def _learn(self, idx: int, reward: float) -> None:
        chosen = self._one_hot(idx)
        self._q, self._delta = self.model.learn(self.grid.theta, self._q, chosen, reward)
        self._last_pe = None  # summarised from _delta only when asked for
        self._previous = idx
        self._forget()

    def _logits(self) -> np.ndarray:
        return self.model.drive(self.grid.theta, self._q, self._one_hot(self._previous))

    def _logit_gap(self) -> np.ndarray:
        """Two options: logit(second) - logit(first) at every grid point, for the next trial.

        Drives are linear in values and previous choice (a contract `choice` keeps), so this
        is the drive of the differences: one pass over the grid instead of three.
        """
        if self._gap is None:
            q, prev = self._q, self._one_hot(self._previous)
            gap = self.model.drive(self.grid.theta, q[1] - q[0], prev[1] - prev[0])
            if gap.shape != self._w.shape:  # a drive that ignores some axis: spread it out
                gap = np.broadcast_to(gap, self._w.shape)
            self._gap = gap
        return self._gap

    def _probs(self) -> np.ndarray:
        """Softmax for the next trial at every grid point (cached until values change)."""
        if self._p is None:
            logits = self._logits()
            e = np.exp(logits - logits.max(0))
            self._p = e / e.sum(0)
        return self._p

    def _one_hot(self, idx: int | None) -> np.ndarray:
        """Indicator of one option over the option axis (all zeros for None); read-only,
        kept per option count since the models only read it."""
        k = len(self.options)
        if self._hots is None or len(self._hots[0]) != k:
            self._hots = [np.zeros((k,) + self._ones)] + [np.zeros((k,) + self._ones) for _ in range(k)]
            for i, hot in enumerate(self._hots[1:]):
                hot[i] = 1.0
            for hot in self._hots:
                hot.flags.writeable = False
        return self._hots[0 if idx is None else idx + 1]

    def _prediction_error(self) -> float | None:
        """The last trial's prediction error, averaged over the posterior of the learning
        parameters (the walk moves beta only, so it leaves that posterior as it was)."""
        if self._delta is not None:
            w_learn = self._w.sum(axis=self._choice_axes, keepdims=True)
            self._last_pe = float((w_learn * self._delta).sum())
            self._delta = None
        return self._last_pe

    # ------------------------------------------------------------------ summaries

    def estimate(self) -> Estimate:
        w = self._w
        params = {p.name: ParamEstimate(*row) for p, row in zip(self.model.params, self.grid.marginal_summaries(w))}
        k = len(self.options)
        q_mean = probs = share = None
        if k:
            w_learn = w.sum(axis=self._choice_axes, keepdims=True).ravel()
            q_mean = rows_dot(self._q.reshape(k, -1), w_learn)
            probs = rows_dot(self._probs().reshape(k, -1), w.ravel())
            top = self._q >= self._q.max(0) - _TIE
            share = rows_dot((top / top.sum(0)).reshape(k, -1), w_learn)
        rate = self._rate_sum / self._rate_norm if self._rate_norm else None
        return build_estimate(
            self.model.name,
            self._session_trial,
            params,
            self.options,
            (q_mean, probs, share),
            (self._prediction_error(), self._last_surprise, rate),
        )

    def p_choice_at_least(self, label: str, level: float) -> float | None:
        """Posterior probability that the animal's next-trial probability of choosing
        `label` is at least `level`: how sure we are that it clearly prefers that option."""
        idx = self._index.get(label)
        if idx is None:
            return None
        if len(self.options) == 2 and 0.0 < level < 1.0:
            # P(second) >= level exactly when the logit gap >= logit(level)
            cut = math.log(level / (1.0 - level))
            gap, sure = self._logit_gap(), self._work
            if idx == 1:
                np.greater_equal(gap, cut, out=sure)  # 1.0 where sure, 0.0 elsewhere
            else:
                np.less_equal(gap, -cut, out=sure)
        else:
            sure = (self._probs()[idx] >= level).astype(float)
        return min(max(dot(sure, self._w), 0.0), 1.0)

    # ------------------------------------------------------------------ sessions and state

    def new_session(self) -> None:
        """Start the next session: broaden the posterior, reset values and history."""
        prior = self.grid.log_prior
        self._w = _weights_from_logs(prior + self.config["temper"] * (np.log(self._w) - prior))
        if not self.config["carry_values"]:
            self._q = np.full(self._q.shape, self.config["q0"])
        self._previous = None
        self._session_trial = 0
        self._rate_sum = self._rate_norm = 0.0
        self._delta = self._last_pe = self._last_surprise = None
        self._forget()

    def state_dict(self) -> dict[str, Any]:
        """Everything needed to continue later, as JSON-ready data (floats round-trip)."""
        return {
            "format": STATE_FORMAT,
            "model": self.model.name,
            "options": list(self.options),
            "config": {**self.config, "grid": dict(self.config["grid"])},
            "weights": self._w.ravel().tolist(),
            "values": self._q.ravel().tolist(),
            "previous": self._previous,
            "session_trial": self._session_trial,
            "reward_rate": [self._rate_sum, self._rate_norm],
            "last": [self._prediction_error(), self._last_surprise],
        }

    @classmethod
    def from_state(cls, state: Mapping[str, Any]) -> OnlineEstimator:
        """Rebuild an estimator exactly as `state_dict` left it."""
        if state.get("format") != STATE_FORMAT:
            raise ValueError(f"estimator state format {state.get('format')!r} is not {STATE_FORMAT}")
        est = cls(state["model"], state["options"], **state["config"])
        w = np.array(state["weights"], dtype=float)
        q = np.array(state["values"], dtype=float)
        if w.size != est._w.size or q.size != est._q.size:
            raise ValueError("estimator state does not match its grid")
        if not (np.all(w >= WEIGHT_FLOOR) and np.all(np.isfinite(w))):
            raise ValueError("estimator state has weights that are not positive numbers")
        est._w = w.reshape(est._w.shape)
        est._q = q.reshape(est._q.shape)
        est._previous = state["previous"]
        est._session_trial = int(state["session_trial"])
        est._rate_sum, est._rate_norm = (float(x) for x in state["reward_rate"])
        est._last_pe, est._last_surprise = state["last"]
        return est

    @classmethod
    def replay(
        cls, trials: Iterable[tuple[Any, str | None, float]], state: Mapping[str, Any] | None = None, **config: Any
    ) -> tuple[OnlineEstimator, list[Estimate]]:
        """Rebuild from stored (session, choice, reward) trials in order.

        Starts from `state` (the end of an earlier session) or fresh from `config`; a new
        session begins whenever the session key changes (and at once when resuming from a
        state), exactly as the live session core would have called `new_session`.
        """
        est = cls.from_state(state) if state is not None else cls(**config)
        return est, replay_into(est, trials, state is not None)


def build_estimate(
    model: str,
    session_trial: int,
    params: dict[str, ParamEstimate],
    options: Sequence[str],
    per_option: tuple[np.ndarray | None, np.ndarray | None, np.ndarray | None],
    last: tuple[float | None, float | None, float | None],
) -> Estimate:
    """An Estimate from posterior means per option: (values, choice probabilities, share of
    the posterior preferring each option) and (prediction error, surprise, reward rate)."""
    q_mean, probs, share = per_option
    values: dict[str, float] = {}
    p_choice: dict[str, float] = {}
    p_prefers: dict[str, float] = {}
    best = exploration = p_best = None
    if q_mean is not None and probs is not None and share is not None:
        values = dict(zip(options, q_mean.tolist()))
        # sums of weights can overshoot 1 by a rounding step; keep them probabilities
        p_choice = dict(zip(options, np.clip(probs, 0.0, 1.0).tolist()))
        p_prefers = dict(zip(options, np.clip(share, 0.0, 1.0).tolist()))
        order = np.argsort(-q_mean, kind="stable")
        if len(options) == 1 or q_mean[order[0]] - q_mean[order[1]] > _TIE:
            best = options[int(order[0])]
            exploration = 1.0 - p_choice[best]
            p_best = p_prefers[best]
    pe, surprise, rate = last
    return Estimate(model, session_trial, params, values, p_choice, pe, surprise, best, exploration, p_best,
                    p_prefers, rate)  # fmt: skip


class _Replayable(Protocol):
    def new_session(self) -> None: ...
    def update(self, choice: str | None, reward: float, *, second: SecondStage | None = None) -> Estimate: ...


def replay_into(est: _Replayable, trials: Iterable[tuple[Any, ...]], resumed: bool) -> list[Estimate]:
    """Feed stored (session, choice, reward) trials in order, with a two-stage trial's
    `SecondStage` as a fourth item; a new session begins whenever the session key changes
    (and at once when resuming from a state), exactly as the live session core would have
    called `new_session`."""
    current: list[Any] = [object()] if resumed else []
    out = []
    for session, choice, reward, *second in trials:
        if current and current[0] != session:
            est.new_session()
        current[:] = [session]
        out.append(est.update(choice, reward, second=second[0] if second else None))
    return out
