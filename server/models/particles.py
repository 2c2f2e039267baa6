"""Online estimate beyond a product grid: sequential Monte Carlo with resample-move.

Why this method. The exact grid filter (`estimator.py`) is exact for static parameters but
its cost grows as the product of its axes: fine for two or three parameters, out of reach for
the five or six of a hybrid model-based/model-free learner. An adaptive sparse grid keeps a
deterministic answer but needs the posterior to be smooth and near-Gaussian in the sparse
directions, which a learning-rate posterior bunched against 0 or 1 is not. Sequential Monte
Carlo (a particle filter over static parameters) has neither limit: its error shrinks with
the number of particles whatever the dimension, and it stays *honest* because every summary
is a weighted average over draws from the posterior itself. Its known weakness with static
parameters is degeneracy (after enough trials a few particles carry all the weight); the
resample-move scheme (Gilks & Berzuini 2001; Chopin 2002) cures it: whenever the effective
sample size falls below a fraction of the particles, they are resampled and each is moved by
a few Metropolis-Hastings steps whose target is the exact posterior given every trial so far
(the move replays the animal's whole history for the proposed parameter sets). The moves use
a Gaussian random walk on the logit of each parameter's unit coordinate, scaled to the
particles' own covariance (2.38² / d; Roberts, Gelman & Gilks 1997), so they adapt to the
posterior's shape without tuning.

So the estimator the lab builds (`make_online_estimator`) is the exact grid where a grid is
exact and affordable (models of up to three parameters, and any model with a drifting beta,
which the grid's walk handles exactly), and this filter for the rest or when asked for by
`method="particles"`. It works for every model through the small kernel interface of
`kernels.py`.

Seeded and deterministic: every draw comes from the estimator's own `numpy.random.Generator`
(seed in the config, bit-generator state in `state_dict`), so replaying the stored trials
rebuilds the live estimate bit for bit. The state is plain JSON with a format number; it
holds the trials seen (the moves need them) with each session's tempering exponent.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any, Literal, overload

import numpy as np

from server.engine.records import SecondStage

from .estimator import Estimate, ParamEstimate, build_estimate
from .kernels import ANSWERED, MISSED, ChoiceKernel, KernelTrial, TrialKernel, Values, get_kernel, replay
from .params import Param, Prior
from .sums import cholesky, covariance, dot, rows_dot, times_transposed

STATE_FORMAT = 1
METHOD = "particles"
# Particle counts chosen by accuracy (tests/models/test_particles*.py, bench/particles.py).
# Up to three parameters: posterior means and 95 % bounds within 2 % of each parameter's range
# of a run with four times as many particles (q_dual_rate misses it: 4.5 %). Beyond: on the
# seven-parameter hybrid, 95 % intervals of w, the rates and the inverse temperatures covered
# the truth in 95.0 % of (animal, parameter) pairs with 2,048 particles (93.3 % on a second
# cohort) and 95.0 % with 8,192 (60 animals from the prior, 300 trials; the six-parameter
# stand-in: 90 % with 512), so they get 2,048.
DEFAULT_PARTICLES = 1024
LARGE_MODEL_PARTICLES = 2048


def default_particles(parameters: int) -> int:
    return DEFAULT_PARTICLES if parameters <= 3 else LARGE_MODEL_PARTICLES


_TIE = 1e-12
_ESS_FLOOR = 0.05  # below this share, pending moves are finished at once (no resampling waits on them)
_TAILS = (0.025, 0.975)


def _truncated_prior_draws(p: Param, n: int, rng: np.random.Generator) -> np.ndarray:
    """n draws from p's prior restricted to its declared range (rejection, then clipping)."""
    out = np.empty(0)
    for _ in range(64):
        x = _prior_draws(p.prior, 4 * n + 16, rng)
        x = x[(x > p.low) & (x < p.high)]
        out = np.concatenate([out, x])
        if len(out) >= n:
            return out[:n]
    raise ValueError(f"{p.name}: its prior puts almost no mass in [{p.low:g}, {p.high:g}]")


def _prior_draws(prior: Prior, n: int, rng: np.random.Generator) -> np.ndarray:
    if prior.kind == "beta":
        return rng.beta(prior.a, prior.b, n)
    if prior.kind == "gamma":
        return rng.gamma(prior.a, prior.b, n)
    if prior.kind == "normal":
        return rng.normal(prior.a, prior.b, n)
    return rng.random(n)  # uniform: scaled into the range by the caller's unit map


class ParticleEstimator:
    """Weighted particles over one model's parameters, each with its own learned values.

    model: a kernel name (`kernels.get_kernel`). particles: how many (default by the model's
    size, see `default_particles`). moves: Metropolis-Hastings sweeps per rejuvenation at
    least, and more (up to 8 x) until the share `moved` of the particles has moved (off by
    default: on the hybrid stand-in, 0.9 raised the coverage of 95 % intervals from 0.90 to 0.92
    at twice the cost). catch_up: stored trials the pending moves replay per update (0: all at
    once; 12 keeps the hybrid's update near 0.8 ms at 2,048 particles, and its coverage was the
    same as with 16 on two cohorts). ess: rejuvenate when the effective sample size falls below
    this fraction. seed: of the estimator's own generator. states, second_options: a two-stage
    task's second-stage states and second-stage option labels, in the order its kernel expects.
    task: the task's structure as plain data, for kernels built from it
    (`kernels.KERNEL_FACTORIES`). temper, carry_values, q0, reward_rate_step: as for the grid
    estimator.
    """

    def __init__(
        self,
        model: str = "q_learning",
        options: Sequence[str] = (),
        *,
        particles: int | None = None,
        moves: int = 2,
        moved: float = 0.0,
        catch_up: int = 12,
        ess: float = 0.5,
        seed: int = 0,
        temper: float = 0.5,
        carry_values: bool = False,
        q0: float = 0.0,
        reward_rate_step: float = 0.1,
        drift: float = 0.0,
        states: Sequence[str] = (),
        second_options: Sequence[str] = (),
        task: Mapping[str, Any] | None = None,
    ):
        if drift:
            raise ValueError("drift is tracked by the grid estimator only (method: grid)")
        self.kernel: TrialKernel = get_kernel(model, q0, task)
        if particles is None:
            particles = default_particles(len(self.kernel.params))
        if not (isinstance(particles, int) and particles >= 16):
            raise ValueError(f"particles must be a whole number >= 16, got {particles!r}")
        if not (isinstance(moves, int) and moves >= 1):
            raise ValueError(f"moves must be a whole number >= 1, got {moves!r}")
        if not (0 <= moved <= 1):
            raise ValueError(f"moved must be in [0, 1], got {moved!r}")
        if not (isinstance(catch_up, int) and catch_up >= 0):
            raise ValueError(f"catch_up must be a whole number >= 0, got {catch_up!r}")
        if not (0 < ess < 1):
            raise ValueError(f"ess must be in (0, 1), got {ess!r}")
        if not (0 < temper <= 1):
            raise ValueError(f"temper must be in (0, 1], got {temper!r}")
        if not (0 < reward_rate_step <= 1):
            raise ValueError(f"reward_rate_step must be in (0, 1], got {reward_rate_step!r}")
        if len(set(options)) != len(options) or not all(isinstance(o, str) and o for o in options):
            raise ValueError("option labels must be distinct non-empty strings")
        self.config: dict[str, Any] = {
            "particles": particles,
            "moves": moves,
            "moved": float(moved),
            "catch_up": catch_up,
            "ess": float(ess),
            "seed": int(seed),
            "temper": float(temper),
            "carry_values": bool(carry_values),
            "q0": float(q0),
            "reward_rate_step": float(reward_rate_step),
            "task": None if task is None else dict(task),
        }
        self.params = self.kernel.params
        self.options: list[str] = list(options)
        self._index = {lab: i for i, lab in enumerate(self.options)}
        # two-stage trials: second-stage states and options in the order the model expects
        # them (a state's index is the first-stage option whose common transition leads there)
        self._states: dict[str, int] = {label: i for i, label in enumerate(states)}
        self._seconds: dict[str, int] = {label: i for i, label in enumerate(second_options)}
        self._rng = np.random.default_rng(seed)
        n = particles
        draws = np.stack([_truncated_prior_draws(p, n, self._rng) for p in self.params], axis=1)
        self._z = self._to_z(draws)
        self._lpz: np.ndarray | None = None  # log prior of z, once asked for (`_current_log_prior`)
        self._theta_cache: dict[str, np.ndarray] | None = None
        self._logw: np.ndarray = np.full(n, -math.log(n))  # normalised log weights
        self._w: np.ndarray | None = None  # the weights, once asked for
        self._ll = np.zeros(n)  # tempered log-likelihood of each particle over the whole history
        self._values = self.kernel.start(n, len(self.options))
        self._trials: list[list[KernelTrial]] = [[]]  # per session
        self._exponents: list[float] = [1.0]  # per session: weight of its evidence
        self._session_trial = 0
        self._rate = [0.0, 0.0]
        self._last_pe: float | None = None
        self._last_surprise: float | None = None
        self.rejuvenations = 0
        self.accepted = 0  # proposals accepted, over all moves
        self._move: _Move | None = None
        self._sweeps = 0  # sweeps of the moves since the last resampling
        self._moved = np.zeros(particles, dtype=bool)  # particles moved since then

    # ------------------------------------------------------------------ coordinates

    def _to_z(self, x: np.ndarray) -> np.ndarray:
        u = np.stack([p.to_unit(x[:, i]) for i, p in enumerate(self.params)], axis=1)
        u = np.clip(u, 1e-12, 1 - 1e-12)
        return np.log(u) - np.log1p(-u)

    def _theta_of(self, z: np.ndarray) -> dict[str, np.ndarray]:
        u = 1.0 / (1.0 + np.exp(-z))
        return {p.name: p.from_unit(u[:, i]) for i, p in enumerate(self.params)}

    @property
    def theta(self) -> dict[str, np.ndarray]:
        if self._theta_cache is None:
            self._theta_cache = self._theta_of(self._z)
        return self._theta_cache

    def _log_prior_z(self, z: np.ndarray, theta: Mapping[str, np.ndarray]) -> np.ndarray:
        """log prior density of the parameters, as a density over z (with the Jacobian);
        `theta` is z's parameter values (`_theta_of(z)`, which the caller already holds)."""
        # du/dz = u (1 - u) for u = logistic(z), whose log is -|z| - 2 log(1 + exp(-|z|)): all
        # parameters at once
        a = np.abs(z)
        out = (-a - 2.0 * np.log1p(np.exp(-a))).sum(axis=1)
        for p in self.params:
            x = theta[p.name]
            lo, hi = p.low, p.high
            if p.scale == "log":  # dx/du = x (log hi - log lo)
                out += p.prior.logpdf(x) + np.log(x) + math.log(math.log(hi) - math.log(lo))
            else:  # dx/du = hi - lo
                out += p.prior.logpdf(x) + math.log(hi - lo)
        return out

    # ------------------------------------------------------------------ trial by trial

    @property
    def model_name(self) -> str:
        return self.kernel.name

    @overload
    def update(
        self, choice: str | None, reward: float, *, second: SecondStage | None = None, summarise: Literal[True] = True
    ) -> Estimate: ...

    @overload
    def update(
        self, choice: str | None, reward: float, *, second: SecondStage | None = None, summarise: bool = True
    ) -> Estimate | None: ...

    def update(
        self, choice: str | None, reward: float, *, second: SecondStage | None = None, summarise: bool = True
    ) -> Estimate | None:
        """Take one finished trial; see `estimator.OnlineEstimator.update`."""
        reward = float(reward)
        if not math.isfinite(reward):
            raise ValueError(f"reward must be a finite number, got {reward!r}")
        if second is not None and isinstance(self.kernel, ChoiceKernel):
            raise ValueError(f"model {self.model_name!r} learns single-stage choices, not two-stage trials")
        trial = self._encode(choice, reward, second)
        self._last_pe = self._last_surprise = None
        if trial.choice >= 0:
            before = self.kernel.option_values(self._values, len(self.options))
            self._last_pe = reward - dot(before[trial.choice], self._weights())
            logp, self._values = self.kernel.step(self.theta, self._values, trial)
            # the log weights stay normalised, so the log predictive is one log-sum-exp, and
            # the same exponentials are the new weights
            joint = self._logw + logp
            top = float(joint.max())
            e = np.exp(joint - top)
            total = float(e.sum())
            log_predictive = top + math.log(total)
            self._last_surprise = -log_predictive
            joint -= log_predictive
            self._logw = joint
            e *= 1.0 / total
            self._w = e
            self._ll += logp
        self._trials[-1].append(trial)
        step = self.config["reward_rate_step"]
        self._rate = [(1 - step) * self._rate[0] + step * reward, (1 - step) * self._rate[1] + step]
        self._session_trial += 1
        if self._move is not None:
            self._advance_move(self.config["catch_up"])
            if self._move is not None and self.ess() < _ESS_FLOOR * len(self._logw):
                self._finish_moves()  # the weights degenerate faster than the moves catch up
        elif self.ess() < self.config["ess"] * len(self._logw):
            self._rejuvenate()
        return self.estimate() if summarise else None

    def _encode(self, choice: str | None, reward: float, second: SecondStage | None) -> KernelTrial:
        idx = -1
        if choice is not None and choice != "":
            if not isinstance(choice, str):
                raise ValueError(f"choice must be an option label or None, got {choice!r}")
            idx = self._index.get(choice, -1)
            if idx < 0:
                idx = self._index[choice] = len(self.options)
                self.options.append(choice)
                self._values = self.kernel.grow(self._values, len(self.options))
        if second is None:
            return KernelTrial(idx, reward, len(self.options))
        state = self._states.setdefault(second.state, len(self._states))
        if second.omitted:
            c2 = MISSED
        elif second.choice is None:
            c2 = ANSWERED  # a single-response state, answered
        else:
            c2 = self._seconds.setdefault(second.choice, len(self._seconds))
        return KernelTrial(idx, reward, len(self.options), state, int(second.common), c2)

    def _set_log_weights(self, logw: np.ndarray) -> None:
        """Log weights, normalised (log-sum-exp 0), and the weights they stand for."""
        self._logw = logw
        self._w = None

    def _weights(self) -> np.ndarray:
        if self._w is None:
            w = np.exp(self._logw)
            w *= 1.0 / w.sum()
            self._w = w
        return self._w

    def ess(self) -> float:
        """Effective sample size of the weights (Kong, Liu & Wong 1994): 1 / sum w²."""
        w = self._weights()
        return 1.0 / dot(w, w)

    def _rejuvenate(self) -> None:
        """Resample (systematic), then start the moves: Metropolis-Hastings steps whose target
        is the posterior given the whole (tempered) history (see `_advance_move`)."""
        n = len(self._logw)
        w = self._weights()
        cdf = np.cumsum(w)
        cdf[-1] = 1.0
        idx = np.searchsorted(cdf, (self._rng.random() + np.arange(n)) / n)
        self._z, self._ll = self._z[idx], self._ll[idx]
        self._lpz = None if self._lpz is None else self._lpz[idx]
        self._values = tuple(v[..., idx] for v in self._values)
        self._set_log_weights(np.full(n, -math.log(n)))
        self._theta_cache = None
        self._sweeps = 0
        self._moved = np.zeros(n, dtype=bool)
        self.rejuvenations += 1
        self._start_move()
        if not self.config["catch_up"]:
            self._finish_moves()

    def _start_move(self) -> None:
        """Draw every particle's proposal: a Gaussian step scaled to the particles' spread."""
        n, d = self._z.shape
        cov = covariance(self._z) + 1e-10 * np.eye(d)
        chol = cholesky(cov * (2.38**2 / d))
        prop = self._z + times_transposed(self._rng.standard_normal((n, d)), chol)
        self._move = _Move(prop, self._theta_of(prop), np.zeros(n), self.kernel.start(n, len(self.options)), 0, 0)

    def _advance_move(self, budget: float) -> None:
        """Replay up to `budget` stored trials for the pending proposals; once they have
        caught up with the present, accept or reject each against its particle.

        A move spread over later trials is still exact: weighted particles that target the
        posterior stay properly weighted under any kernel that leaves the posterior
        invariant, and the proposals are judged on every trial up to the moment they
        catch up, the same trials the particles' own likelihoods cover."""
        move = self._move
        assert move is not None
        k, done = len(self.options), 0
        while done < budget:
            trials = self._trials[move.session]
            if move.trial == len(trials):
                if move.session == len(self._trials) - 1:
                    # judging (and drawing the next proposals) costs about half a budget's
                    # replay: after a longer replay it waits for the next update, which
                    # replays that update's trial first, so no update does both in full
                    if done <= budget / 2:
                        self._judge(move)
                    return
                move.session, move.trial = move.session + 1, 0
                if not self.config["carry_values"]:
                    move.values = self.kernel.start(len(move.ll), k)
                continue
            # the next stretch of this session holding at most the budget's answered trials,
            # replayed in one call
            end, answered = move.trial, 0
            while end < len(trials) and answered < budget - done:
                answered += trials[end].choice >= 0
                end += 1
            chunk, move.trial = trials[move.trial : end], end
            if move.values[0].shape[0] < k:
                move.values = self.kernel.grow(move.values, k)
            ll, move.values = replay(self.kernel, move.theta, move.values, chunk, self._exponents[move.session])
            move.ll += ll
            done += answered

    def _current_log_prior(self) -> np.ndarray:
        """The particles' own log prior over z, kept until they change (a move's judgement
        needs it, and most particles are where the last one left them)."""
        if self._lpz is None:
            self._lpz = self._log_prior_z(self._z, self.theta)
        return self._lpz

    def _judge(self, move: _Move) -> None:
        lp, lp_prop = self._current_log_prior(), self._log_prior_z(move.z, move.theta)
        accept = np.log(self._rng.random(len(lp))) < (move.ll + lp_prop) - (self._ll + lp)
        self._lpz = np.where(accept, lp_prop, lp)
        self._z = np.where(accept[:, None], move.z, self._z)
        self._ll = np.where(accept, move.ll, self._ll)
        values = self.kernel.grow(move.values, len(self.options))
        self._values = tuple(np.where(accept, vp, v) for vp, v in zip(values, self._values))
        self._theta_cache = None
        self.accepted += int(accept.sum())
        self._sweeps += 1
        self._moved |= accept
        self._move = None
        # at least `moves` sweeps, then on until the share `moved` of the particles has left
        # its resampled copy (a mixing check: duplicates left by resampling narrow the
        # intervals), at most 8 x `moves`
        moves = self.config["moves"]
        if self._sweeps < moves or (self._moved.mean() < self.config["moved"] and self._sweeps < 8 * moves):
            self._start_move()

    def _finish_moves(self) -> None:
        while self._move is not None:
            self._advance_move(math.inf)

    # ------------------------------------------------------------------ summaries

    def estimate(self) -> Estimate:
        w = self._weights()
        theta = self.theta
        params = {p.name: _weighted_summary(theta[p.name], w) for p in self.params}
        k = len(self.options)
        q_mean = probs = share = None
        if k:
            q = self.kernel.option_values(self._values, k)
            q_mean = rows_dot(q, w)
            probs = rows_dot(self.kernel.probabilities(theta, self._values, k), w)
            top = q >= q.max(0) - _TIE
            share = rows_dot(top / top.sum(0), w)
        rate = self._rate[0] / self._rate[1] if self._rate[1] else None
        return build_estimate(self.model_name, self._session_trial, params, self.options, (q_mean, probs, share),
                              (self._last_pe, self._last_surprise, rate))  # fmt: skip

    def p_choice_at_least(self, label: str, level: float) -> float | None:
        idx = self._index.get(label)
        if idx is None:
            return None
        probs = self.kernel.probabilities(self.theta, self._values, len(self.options))[idx]
        return min(max(dot(probs >= level, self._weights()), 0.0), 1.0)

    # ------------------------------------------------------------------ sessions and state

    def new_session(self) -> None:
        """Start the next session: earlier evidence counts `temper` times less (the weights
        move to the tempered target at once, and the particles follow when they are moved)."""
        temper = self.config["temper"]
        self._finish_moves()  # the pending proposals were judged under the old exponents
        if self._trials[-1]:
            logw = self._logw + (temper - 1.0) * self._ll
            self._set_log_weights(logw - _logsumexp(logw))
            self._ll = temper * self._ll
            self._exponents = [e * temper for e in self._exponents] + [1.0]
            self._trials.append([])
        if not self.config["carry_values"]:
            self._values = self.kernel.start(len(self._logw), len(self.options))
        self._session_trial = 0
        self._rate = [0.0, 0.0]
        self._last_pe = self._last_surprise = None
        if self.ess() < self.config["ess"] * len(self._logw):
            self._rejuvenate()

    def state_dict(self) -> dict[str, Any]:
        return {
            "format": STATE_FORMAT,
            "method": METHOD,
            "model": self.model_name,
            "options": list(self.options),
            "states": list(self._states),
            "seconds": list(self._seconds),
            "config": dict(self.config),
            "z": self._z.tolist(),
            "log_weights": self._logw.tolist(),
            "weights": self._weights().tolist(),  # as derived live, to the last bit
            "loglik": self._ll.tolist(),
            "values": [v.tolist() for v in self._values],
            "trials": [[list(t) for t in session] for session in self._trials],
            "exponents": list(self._exponents),
            "session_trial": self._session_trial,
            "reward_rate": list(self._rate),
            "last": [self._last_pe, self._last_surprise],
            "rejuvenations": [self.rejuvenations, self.accepted],
            "move": None if self._move is None else self._move.to_state(self._sweeps, self._moved),
            "rng": self._rng.bit_generator.state,
        }

    @classmethod
    def from_state(cls, state: Mapping[str, Any]) -> ParticleEstimator:
        if state.get("method") != METHOD:
            raise ValueError("not a particle estimator state")
        if state.get("format") != STATE_FORMAT:
            raise ValueError(f"particle estimator state format {state.get('format')!r} is not {STATE_FORMAT}")
        est = cls(state["model"], state["options"], **state["config"], states=state["states"],
                  second_options=state["seconds"])  # fmt: skip
        n = est.config["particles"]
        z = np.array(state["z"], dtype=float)
        if z.shape != est._z.shape or len(state["log_weights"]) != n:
            raise ValueError("particle estimator state does not match its particle count")
        est._z, est._lpz = z, None
        est._set_log_weights(np.array(state["log_weights"], dtype=float))
        est._w = np.array(state["weights"], dtype=float)
        est._ll = np.array(state["loglik"], dtype=float)
        est._values = tuple(np.array(v, dtype=float) for v in state["values"])
        est._states = {s: i for i, s in enumerate(state["states"])}
        est._seconds = {s: i for i, s in enumerate(state["seconds"])}
        est._trials = [[KernelTrial(int(t[0]), float(t[1]), *map(int, t[2:])) for t in s] for s in state["trials"]]
        est._exponents = [float(e) for e in state["exponents"]]
        est._session_trial = int(state["session_trial"])
        est._rate = [float(x) for x in state["reward_rate"]]
        est._last_pe, est._last_surprise = state["last"]
        est.rejuvenations, est.accepted = (int(x) for x in state["rejuvenations"])
        if state["move"] is not None:
            est._move, est._sweeps, est._moved = _Move.from_state(state["move"], est)
        est._rng.bit_generator.state = state["rng"]
        return est


def _weighted_summary(x: np.ndarray, w: np.ndarray) -> ParamEstimate:
    """Weighted mean and equal-tailed 95 % interval (quantiles of the weighted empirical
    distribution, each draw's mass centred on it)."""
    order = np.argsort(x, kind="stable")
    xs, ws = x[order], w[order]
    mid = np.cumsum(ws) - 0.5 * ws
    lo, hi = np.interp(_TAILS, mid, xs)
    return ParamEstimate(dot(x, w), float(lo), float(hi))


def _logsumexp(a: np.ndarray) -> float:
    top = float(a.max())
    return top + math.log(float(np.exp(a - top).sum()))


class _Move:
    """Proposals waiting to catch up with the present: where their replay has got to."""

    def __init__(self, z: np.ndarray, theta: dict[str, np.ndarray], ll: np.ndarray, values: Values, session: int,
                 trial: int):  # fmt: skip
        self.z, self.theta, self.ll, self.values = z, theta, ll, values
        self.session, self.trial = session, trial

    def to_state(self, sweeps: int, moved: np.ndarray) -> dict[str, Any]:
        return {
            "z": self.z.tolist(),
            "loglik": self.ll.tolist(),
            "values": [v.tolist() for v in self.values],
            "at": [self.session, self.trial],
            "sweeps": sweeps,
            "moved": moved.astype(int).tolist(),
        }

    @staticmethod
    def from_state(state: Mapping[str, Any], est: ParticleEstimator) -> tuple[_Move, int, np.ndarray]:
        z = np.array(state["z"], dtype=float)
        values = tuple(np.array(v, dtype=float) for v in state["values"])
        move = _Move(z, est._theta_of(z), np.array(state["loglik"], dtype=float), values, *state["at"])
        return move, int(state["sweeps"]), np.array(state["moved"], dtype=bool)
