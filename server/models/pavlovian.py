"""Rescorla-Wagner learning of CS-US associations, mapped to anticipatory responding.

Pavlovian sessions (autoshaping, conditioned approach) have no choice to fit; what the
animal shows is anticipatory responding during the CS (head entries, lever contacts).
The associative strength of the CSs present is mapped through a logistic function to the
probability of responding on a trial, which is what a fit or a status page can use.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from .params import Param, Prior, check_params


def rw_update(v: np.ndarray, present: np.ndarray, alpha, beta, lam) -> np.ndarray:
    """One Rescorla-Wagner trial: dV_X = alpha_X beta (lambda - sum of V over CSs present).

    Rescorla & Wagner (1972). `v` and `present` have CSs on the last axis; `alpha` is the
    salience (scalar or per CS), `beta` the US learning rate, `lam` the US asymptote
    (0 on a non-reinforced trial). Absent CSs are not updated.
    """
    present = np.asarray(present, dtype=float)
    total = (v * present).sum(-1, keepdims=True)
    beta = np.asarray(beta, dtype=float)[..., None]
    lam = np.asarray(lam, dtype=float)[..., None]
    return v + np.asarray(alpha, dtype=float) * beta * (lam - total) * present


def response_probability(v: np.ndarray, present: np.ndarray, slope, bias) -> np.ndarray:
    """P(anticipatory response) = logistic(bias + slope * sum of V over CSs present)."""
    total = (np.asarray(v) * np.asarray(present, dtype=float)).sum(-1)
    return 1.0 / (1.0 + np.exp(-(bias + slope * total)))


@dataclass(frozen=True, slots=True)
class PavlovianModel:
    name: str
    params: tuple[Param, ...]
    summary: str

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.params)

    def check(self, values: Mapping[str, object]) -> dict[str, float]:
        return check_params(self.name, self.params, values)


RESCORLA_WAGNER = PavlovianModel(
    "rescorla_wagner",
    (
        Param("alpha", 0.0, 1.0, "linear", Prior("beta", 1.1, 1.1), True, 48, "salience of each CS"),
        Param("beta", 0.0, 1.0, "linear", Prior("beta", 1.1, 1.1), True, 48, "learning rate set by the US"),
        Param(
            "slope",
            0.0,
            50.0,
            "linear",
            Prior("gamma", 1.2, 5.0),
            False,
            32,
            "gain from associative strength to responding",
        ),
        Param(
            "bias",
            -10.0,
            10.0,
            "linear",
            Prior("normal", -2.0, 2.0),
            False,
            32,
            "log-odds of responding to a CS with no associative strength",
        ),
    ),
    "Rescorla-Wagner with a logistic mapping to anticipatory responding",
)


def rw_session(
    params: Mapping[str, float],
    present: Sequence[Sequence[bool]],
    lam: Sequence[float],
    v0: Sequence[float] | None = None,
) -> dict[str, np.ndarray]:
    """Run Rescorla-Wagner over trials; returns strengths before each trial and P(response).

    `present[t]` flags which CSs are on in trial t, `lam[t]` the US asymptote of trial t.
    """
    p = RESCORLA_WAGNER.check(params)
    on = np.asarray(present, dtype=float)
    us = np.asarray(lam, dtype=float)
    if on.ndim != 2 or us.shape != on.shape[:1]:
        raise ValueError("present must be trials x CSs and lam one value per trial")
    v = np.zeros(on.shape[1]) if v0 is None else np.asarray(v0, dtype=float).copy()
    before = np.empty_like(on)
    for t in range(on.shape[0]):
        before[t] = v
        v = rw_update(v, on[t], p["alpha"], p["beta"], us[t])
    prob = response_probability(before, on, p["slope"], p["bias"])
    return {"v_before": before, "v_after": v, "p_response": prob}


def rw_loglik(params: Mapping[str, float], present, lam, responded) -> float:
    """Bernoulli log-likelihood of anticipatory responding (1 = responded in the CS)."""
    out = rw_session(params, present, lam)
    y = np.asarray(responded, dtype=float)
    pr = np.clip(out["p_response"], 1e-300, 1.0)
    return float((y * np.log(pr) + (1 - y) * np.log(np.clip(1 - pr, 1e-300, 1.0))).sum())
