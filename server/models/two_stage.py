"""The hybrid model-based/model-free learner of two-stage choice tasks (Daw, Gershman, Seymour,
Dayan & Dolan 2011, Neuron 69:1204), as one pure trial update vectorised over parameter sets.

The interface an online estimator runs, one call per trial
----------------------------------------------------------
::

    task = TwoStageTask.from_protocol(protocol.two_stage)     # or TwoStageTask.build(...)
    values = initial_values(task, shape=(N,))                  # N parameter sets (particles)
    trial = task.encode("west", "north", "north_port", 1.0)    # what the animal did
    step = hybrid_step(theta, values, task, trial.expand(1))   # per trial, all N at once
    step.logp          # (N,) log P(first choice, second choice | each parameter set)
    step.values        # the values after the trial's update: feed to the next call
    step.delta1, step.delta2   # the stage-1 and stage-2 prediction errors, (N,)

- `theta` maps every name of `HYBRID_PARAMS` to an array broadcasting against the trailing
  shape `P` of the values (`(N,)` above; `(animals, candidates)` in the batch fit). A named
  variant (`TWO_STAGE_MODELS`) fixes some of them: `variant.theta(free)` fills them in.
- `HybridValues` holds `q1` (K1, *P) model-free first-stage values, `q2` (S, B, *P) the
  second-stage values of each state's option slots, and `prev` (K1, *P) the one-hot of the
  last first-stage choice of the session (all zeros at session start). Options come first,
  parameter sets after, as in server/models/choice.py.
- `task.encode(choice, state, choice2, reward, omitted2=...)`: `choice` None for a
  first-stage omission, `omitted2=True` for a second-stage one, `choice2` None in a state
  with a single response. (From a record: `TwoStageRow.from_record` gives these fields.)
- `EncodedTrial` arrays have no parameter axes; the batch fit gives them trailing animal
  axes instead (`TrialArrays`), which broadcast the same way. `trial.expand(ndim)` appends
  singleton axes so they broadcast against values with `ndim` trailing axes.
- `hybrid_step` never mutates its inputs; particles can be resampled by indexing the value
  arrays' trailing axes (`values.take(index)`).
- A new session starts from `initial_values` again (or, keeping what was learned, from the
  same `q1` and `q2` with `prev` zeroed: the perseveration term never spans two sessions),
  as `run_hybrid` (server/models/two_stage_trials.py) does for the batch fit.

Omissions. A first-stage omission (no choice) adds nothing to the log-likelihood and
changes no value, and the previous choice used by the perseveration term stays the last
one made. A second-stage omission (a choice was made, the state was reached, no
second-stage response came) counts the first-stage choice in the likelihood and as the
previous choice, but updates no value: with no second-stage action neither the SARSA step
nor the outcome update is defined. A single-response state (no second choice) has one
option slot; responding there has probability 1 and its value is learned from the outcome
like any second-stage value.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from server.protocol.reader import did_you_mean

from .choice import log_choice_probability
from .params import DeclaredParams, Param, Prior, learning_rate

Theta = Mapping[str, np.ndarray | float]


def _beta(name: str, doc: str) -> Param:
    # the same range, spacing and prior as the single-stage inverse temperature (params.py)
    return Param(name, 0.01, 50.0, "log", Prior("gamma", 1.2, 5.0), False, 16, doc, grid_low=0.1, grid_high=30.0)


# Daw et al. (2011), table 1: seven free parameters. The weight's prior is Beta(1.1, 1.1)
# like the rates' (our choice); the perseveration prior Normal(0, 0.5) is our choice too.
HYBRID_PARAMS: tuple[Param, ...] = (
    learning_rate("alpha1", "first-stage learning rate", 16),
    learning_rate("alpha2", "second-stage learning rate", 16),
    Param(
        "lambda", 0.0, 1.0, "linear", Prior("beta", 1.1, 1.1), True, 8,
        "eligibility: share of the second-stage prediction error passed back to the first stage",
    ),
    _beta("beta1", "first-stage inverse temperature"),
    _beta("beta2", "second-stage inverse temperature"),
    Param(
        "w", 0.0, 1.0, "linear", Prior("beta", 1.1, 1.1), False, 16,
        "weight of model-based values in the first-stage choice (0 model-free, 1 model-based)",
    ),
    Param(
        "persev", -2.0, 2.0, "linear", Prior("normal", 0.0, 0.5), False, 16,
        "perseveration: bonus, in units of beta1, for repeating the previous first-stage choice",
    ),
)  # fmt: skip


@dataclass(frozen=True, slots=True)
class TwoStageModel(DeclaredParams):
    """A named variant of the hybrid: which parameters it fixes, and at what values."""

    name: str
    fixed: dict[str, float]
    summary: str
    params: tuple[Param, ...] = field(init=False)  # the free ones, in declaration order

    def __post_init__(self) -> None:
        object.__setattr__(self, "params", tuple(p for p in HYBRID_PARAMS if p.name not in self.fixed))

    def theta(self, free: Mapping[str, np.ndarray | float]) -> dict[str, np.ndarray | float]:
        """The full parameter set of `hybrid_step`: the free values plus the fixed ones."""
        return {**self.fixed, **free}

    def for_task(self, task: TwoStageTask) -> TwoStageModel:
        """This variant as it can be estimated on `task`. Where no state offers a choice (each
        second stage a single response), beta2 never enters the likelihood: it is fixed
        (at 1, a value that does not matter) rather than estimated at its prior, so it does
        not count as a parameter and its flat direction cannot trouble a fit or a filter."""
        if task.slots > 1 or "beta2" in self.fixed:
            return self
        return TwoStageModel(self.name, {**self.fixed, "beta2": 1.0}, self.summary)


TWO_STAGE_MODELS: dict[str, TwoStageModel] = {
    m.name: m
    for m in (
        TwoStageModel("hybrid", {}, "model-based and model-free first-stage values mixed by w"),
        # w = 0: the model-based values carry no weight
        TwoStageModel("model_free", {"w": 0.0}, "model-free SARSA(lambda) only (w = 0)"),
        # w = 1: the model-free first-stage values carry no weight, so alpha1 and lambda
        # cannot change a choice; they are fixed (at values that do not matter) so as not
        # to count as parameters
        TwoStageModel(
            "model_based", {"w": 1.0, "alpha1": 0.5, "lambda": 0.0}, "model-based first-stage values only (w = 1)"
        ),
    )
}


def get_two_stage_model(name: str) -> TwoStageModel:
    """Look a two-stage model up by name, with a did-you-mean on a typo."""
    try:
        return TWO_STAGE_MODELS[name]
    except KeyError:
        hint = did_you_mean(name, TWO_STAGE_MODELS, aside=True)
        raise ValueError(f"unknown two-stage model {name!r}{hint}; known: {', '.join(TWO_STAGE_MODELS)}") from None


@dataclass(frozen=True, slots=True, eq=False)
class EncodedTrial:
    """One trial as one-hot arrays (see the module docstring); zeros where nothing happened."""

    first: np.ndarray  # (K1,) first-stage choice
    reached: np.ndarray  # (S,) state reached
    offered: np.ndarray  # (B,) option slots of the reached state
    second: np.ndarray  # (B,) slot taken there (the one slot of a single-response state)
    reward: float

    def expand(self, ndim: int) -> TrialArrays:
        pad = (1,) * ndim
        first, reached, offered, second = (
            a.reshape(a.shape + pad) for a in (self.first, self.reached, self.offered, self.second)
        )
        return TrialArrays(first, reached, offered, second, np.full(pad, self.reward))


class TrialArrays(NamedTuple):
    """A trial's arrays with trailing axes (singletons, or animals in the batch fit)."""

    first: np.ndarray  # (K1, *X)
    reached: np.ndarray  # (S, *X)
    offered: np.ndarray  # (B, *X)
    second: np.ndarray  # (B, *X)
    reward: np.ndarray  # (*X)


@dataclass(frozen=True, slots=True, eq=False)
class TwoStageTask:
    """The task's structure as the model knows it: first-stage options, states and their
    option slots, and the transition matrix (the model-based system's known model)."""

    first: tuple[str, ...]
    states: tuple[str, ...]
    options: tuple[tuple[str, ...], ...]  # per state; () for a single-response state
    transitions: np.ndarray  # (K1, S), rows sum to 1

    @classmethod
    def build(
        cls,
        first: Sequence[str],
        states: Mapping[str, Sequence[str]],
        transitions: Mapping[str, Mapping[str, float]],
    ) -> TwoStageTask:
        """From labels: `states` maps each state to its options (empty: single response),
        `transitions` each first option to {state: probability}."""
        names = tuple(states)
        t = np.zeros((len(first), len(names)))
        for i, a in enumerate(first):
            row = transitions.get(a)
            if not row:
                raise ValueError(f"first-stage option {a!r} has no transitions")
            for s, prob in row.items():
                if s not in names:
                    raise ValueError(f"first-stage option {a!r} leads to unknown state {s!r}")
                t[i, names.index(s)] = float(prob)
            if not np.isclose(t[i].sum(), 1.0):
                raise ValueError(f"transition probabilities of {a!r} sum to {t[i].sum():g}, not 1")
        return cls(tuple(first), names, tuple(tuple(states[s]) for s in names), t)

    @classmethod
    def from_protocol(cls, spec) -> TwoStageTask:
        """From a protocol's `TwoStage` structure (server/protocol/model.py)."""
        return cls.build(spec.first, {n: s.options for n, s in spec.states.items()}, spec.transitions)

    @property
    def slots(self) -> int:
        """B: option slots per state (the most options any state has; 1 at least)."""
        return max(1, *(len(o) for o in self.options))

    @property
    def valid(self) -> np.ndarray:
        """(S, B) which slots each state has (slot 0 alone for a single-response state)."""
        out = np.zeros((len(self.states), self.slots), dtype=bool)
        for i, o in enumerate(self.options):
            out[i, : max(1, len(o))] = True
        return out

    def common_state(self, first: str) -> str:
        return self.states[int(np.argmax(self.transitions[self.first.index(first)]))]

    def same_as(self, other: TwoStageTask) -> bool:
        return (
            (self.first, self.states, self.options) == (other.first, other.states, other.options)
            and self.transitions.shape == other.transitions.shape
            and bool(np.allclose(self.transitions, other.transitions))
        )

    def encode(
        self,
        choice: str | None,
        state: str | None = None,
        choice2: str | None = None,
        reward: float = 0.0,
        *,
        omitted2: bool = False,
    ) -> EncodedTrial:
        """A trial: first choice (None = omission), state reached, second-stage option chosen
        (None in a single-response state); `omitted2` for a second-stage omission."""
        k1, s_n, b = len(self.first), len(self.states), self.slots
        first, reached, offered, second = np.zeros(k1), np.zeros(s_n), np.zeros(b), np.zeros(b)
        if choice is not None:
            first[self.first.index(choice)] = 1.0
            si = self.states.index(state) if state is not None else -1
            if si < 0:
                raise ValueError("a first-stage choice needs the state it led to")
            reached[si] = 1.0
            opts = self.options[si]
            offered[: max(1, len(opts))] = 1.0
            if omitted2:
                pass
            elif choice2 is not None:
                second[opts.index(choice2)] = 1.0
            elif len(opts) > 1:
                raise ValueError(f"state {state!r} offers a choice: choice2 is missing")
            else:  # a single response (or a state's one option, answered as its response)
                second[0] = 1.0
        return EncodedTrial(first, reached, offered, second, float(reward))


class HybridValues(NamedTuple):
    q1: np.ndarray  # (K1, *P) model-free first-stage values
    q2: np.ndarray  # (S, B, *P) second-stage values
    prev: np.ndarray  # (K1, *P) one-hot of the previous first-stage choice

    def take(self, index: np.ndarray) -> HybridValues:
        """The values of the parameter sets `index` (along the first trailing axis)."""
        return HybridValues(self.q1[:, index], self.q2[:, :, index], self.prev[:, index])


def initial_values(task: TwoStageTask, shape: tuple[int, ...], q0: float = 0.0) -> HybridValues:
    k1, s_n, b = len(task.first), len(task.states), task.slots
    return HybridValues(np.full((k1, *shape), q0), np.full((s_n, b, *shape), q0), np.zeros((k1, *shape)))


class Step(NamedTuple):
    logp: np.ndarray  # log P(what the animal did) per parameter set; 0 on an omission
    values: HybridValues  # after the trial's update
    delta1: np.ndarray  # stage-1 prediction error Q2(s, b) - Q_MF(a) (0 where undefined)
    delta2: np.ndarray  # stage-2 prediction error r - Q2(s, b) (0 where undefined)
    q_mb: np.ndarray  # (K1, *P) model-based first-stage values before the choice
    q_net: np.ndarray  # (K1, *P) w Q_MB + (1 - w) Q_MF before the choice
    logits1: np.ndarray  # (K1, *P) the first-stage softmax input


def model_based_values(task: TwoStageTask, q2: np.ndarray, valid: np.ndarray | None = None) -> np.ndarray:
    """Q_MB(a) = sum_s P(s | a) max_b Q2(s, b) (Daw et al. 2011, eq. for Q_MB): (K1, *P)."""
    valid = task.valid if valid is None else valid
    best = np.where(valid.reshape(valid.shape + (1,) * (q2.ndim - 2)), q2, -np.inf).max(1)
    return np.tensordot(task.transitions, best, axes=(1, 0))


def _log_prob_among(logits: np.ndarray, offered: np.ndarray, chosen: np.ndarray) -> np.ndarray:
    """log P(chosen) under a softmax over the offered slots only; 0 where nothing was chosen."""
    if len(logits) == 2:
        return _log_prob_pair(logits, chosen, offered[1])
    z = np.where(offered > 0, logits, -np.inf)
    top = z.max(0)
    top = np.where(np.isfinite(top), top, 0.0)
    total = np.exp(z - top).sum(0)
    lse = top + np.log(np.maximum(total, 1e-300))
    picked = np.where(chosen > 0, logits, 0.0).sum(0)
    return np.where(chosen.sum(0) > 0, picked - lse, 0.0)


def _log_prob_pair(logits: np.ndarray, chosen: np.ndarray, both: np.ndarray | float = 1.0) -> np.ndarray:
    """Two options: log P(chosen) = -log(1 + exp(z_other - z_chosen)), one ufunc instead of a
    log-sum-exp; 0 where nothing was chosen or (`both` = 0) only one option was offered."""
    gap = (logits[1] - logits[0]) * (chosen[0] - chosen[1])
    return -np.logaddexp(0.0, gap) * ((chosen[0] + chosen[1]) * both)


def hybrid_step(
    theta: Theta, values: HybridValues, task: TwoStageTask, trial: TrialArrays, valid: np.ndarray | None = None
) -> Step:
    """One trial of the hybrid learner: the log-probability of what the animal did under each
    parameter set, and the values after learning from it (Daw et al. 2011, equations 1-4)."""
    q1, q2, prev = values
    first, reached, offered, second, reward = trial
    # first stage: Q_net = w Q_MB + (1 - w) Q_MF; P(a) proportional to
    # exp(beta1 [Q_net(a) + p rep(a)]) with rep(a) = 1 for the previous first choice
    q_mb = model_based_values(task, q2, valid)
    w = theta["w"]
    q_net = w * q_mb + (1.0 - w) * q1
    logits1 = theta["beta1"] * (q_net + theta["persev"] * prev)
    logp = _log_prob_pair(logits1, first) if len(first) == 2 else log_choice_probability(logits1, first)
    # second stage: softmax with beta2 over the options of the state reached
    q2_state = (q2 * reached[:, None]).sum(0)  # (B, *P)
    logp = logp + _log_prob_among(theta["beta2"] * q2_state, offered, second)
    # SARSA(lambda): delta1 = Q2(s, b) - Q_MF(a); delta2 = r - Q2(s, b);
    # Q_MF(a) += alpha1 (delta1 + lambda delta2); Q2(s, b) += alpha2 delta2
    responded = second.sum(0)  # 1 where a second-stage action was taken
    q2_taken = (q2_state * second).sum(0)
    delta1 = (q2_taken - (q1 * first).sum(0)) * responded
    delta2 = (reward - q2_taken) * responded
    q1_new = q1 + theta["alpha1"] * (delta1 + theta["lambda"] * delta2) * first * responded
    q2_new = q2 + theta["alpha2"] * delta2 * (reached[:, None] * second[None])
    made = first.sum(0) > 0
    prev_new = np.where(made, first, prev)
    return Step(logp, HybridValues(q1_new, q2_new, prev_new), delta1, delta2, q_mb, q_net, logits1)


__all__ = [
    "HYBRID_PARAMS",
    "TWO_STAGE_MODELS",
    "EncodedTrial",
    "HybridValues",
    "Step",
    "TrialArrays",
    "TwoStageModel",
    "TwoStageTask",
    "get_two_stage_model",
    "hybrid_step",
    "initial_values",
    "model_based_values",
]
