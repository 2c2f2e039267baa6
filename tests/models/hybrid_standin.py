"""A stand-in hybrid model-based/model-free kernel for checking and timing the particle estimator.

Written from Daw et al. (2011), Neuron 69:1204, until the project's own hybrid model lands
(tests/models/test_particles_hybrid.py, bench/particles.py): six parameters (w, alpha, beta1,
beta2, lam, persev), two first-stage options,
two second-stage states with two options each, transitions 0.7 common / 0.3 rare, values and
the previous first choice per parameter set, numpy across parameter sets. It is not used by
the product; the adapter of the real model will take its place in server/models/kernels.py.
The simulator below is plain Python, written apart from the numpy kernel.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from server.models.kernels import KernelTrial, Values
from server.models.params import Param, Prior, learning_rate

COMMON = 0.7


def _beta(name: str) -> Param:
    return Param(name, 0.01, 50.0, "log", Prior("gamma", 1.2, 5.0), False, 16, "inverse temperature")


class HybridStandIn:
    name = "hybrid_standin"
    params = (
        Param("w", 0.0, 1.0, "linear", Prior("beta", 1.1, 1.1), False, 8, "model-based weight"),
        learning_rate("alpha", "learning rate", 8),
        _beta("beta1"),
        _beta("beta2"),
        learning_rate("lam", "eligibility trace", 8),
        Param("persev", -5.0, 5.0, "linear", Prior("normal", 0.0, 2.0), False, 8, "perseveration"),
    )

    def start(self, n: int, options: int) -> Values:
        return np.zeros((2, n)), np.zeros((2, 2, n)), np.zeros((2, n))

    def grow(self, values: Values, options: int) -> Values:
        return values

    def _first_logits(self, theta: Mapping[str, np.ndarray], values: Values) -> np.ndarray:
        q1, q2, prev = values
        best = q2.max(1)  # (state, n)
        qmb = np.stack([COMMON * best[0] + (1 - COMMON) * best[1], COMMON * best[1] + (1 - COMMON) * best[0]])
        w = theta["w"]
        return theta["beta1"] * (w * qmb + (1 - w) * q1) + theta["persev"] * prev

    def step(self, theta: Mapping[str, np.ndarray], values: Values, trial: KernelTrial) -> tuple[np.ndarray, Values]:
        q1, q2, prev = values
        a1, s, a2, r = trial.choice, trial.state, trial.choice2, trial.reward
        if a1 < 0:
            return np.zeros(q1.shape[1]), values
        # two options: log P(a) = -log(1 + exp(z_other - z_a)), the logistic form of the softmax
        z1 = self._first_logits(theta, values)
        gap2 = theta["beta2"] * (q2[s, 1 - a2] - q2[s, a2])
        logp = -(np.logaddexp(0.0, z1[1 - a1] - z1[a1]) + np.logaddexp(0.0, gap2))
        alpha = theta["alpha"]
        q1, q2 = q1.copy(), q2.copy()
        d1 = q2[s, a2] - q1[a1]
        q1[a1] += alpha * d1
        d2 = r - q2[s, a2]
        q2[s, a2] += alpha * d2
        q1[a1] += alpha * theta["lam"] * d2
        prev = np.zeros_like(prev)
        prev[a1] = 1.0
        return logp, (q1, q2, prev)

    def probabilities(self, theta: Mapping[str, np.ndarray], values: Values, options: int) -> np.ndarray:
        z = self._first_logits(theta, values)
        e = np.exp(z - z.max(0))
        return e / e.sum(0)

    def option_values(self, values: Values, options: int) -> np.ndarray:
        return values[0][:options]


def simulate(p: dict[str, float], n: int, seed: int) -> list[tuple[int, int, int, int, float]]:
    """(first choice, state, common, second choice, reward) from a plain-Python hybrid animal."""
    rng = np.random.default_rng(seed)
    q1, q2, prev, out = [0.0, 0.0], [[0.0, 0.0], [0.0, 0.0]], -1, []
    pr = rng.uniform(0.25, 0.75, (2, 2))
    for _ in range(n):
        best = [max(q2[0]), max(q2[1])]
        qmb = [COMMON * best[0] + (1 - COMMON) * best[1], COMMON * best[1] + (1 - COMMON) * best[0]]
        z = [p["beta1"] * (p["w"] * qmb[a] + (1 - p["w"]) * q1[a]) + p["persev"] * (a == prev) for a in (0, 1)]
        a1 = int(rng.random() < 1 / (1 + np.exp(z[0] - z[1])))
        common = rng.random() < COMMON
        s = a1 if common else 1 - a1
        z2 = [p["beta2"] * q2[s][b] for b in (0, 1)]
        a2 = int(rng.random() < 1 / (1 + np.exp(z2[0] - z2[1])))
        r = float(rng.random() < pr[s, a2])
        d1 = q2[s][a2] - q1[a1]
        q1[a1] += p["alpha"] * d1
        d2 = r - q2[s][a2]
        q2[s][a2] += p["alpha"] * d2
        q1[a1] += p["alpha"] * p["lam"] * d2
        prev = a1
        pr = np.clip(pr + 0.025 * rng.standard_normal((2, 2)), 0.25, 0.75)
        out.append((a1, s, int(common), a2, r))
    return out
