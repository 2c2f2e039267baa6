"""An independent two-stage task and hybrid learner, for checking server.models against.

Written from the published task and update equations (Daw, Gershman, Seymour, Dayan & Dolan
2011, Neuron 69:1204) in plain Python, sharing no code with server.models: first-stage
options "left"/"right" lead to states "upper"/"lower" with probability 0.7 (common) or
0.3 (rare); each state offers two options whose reward probabilities drift by a Gaussian
walk (sd 0.025) reflected at 0.25 and 0.75, as in Daw et al. (2011).
"""

from __future__ import annotations

import math
import random

FIRST = ("left", "right")
STATES = ("upper", "lower")
OPTIONS = {"upper": ("a", "b"), "lower": ("c", "d")}
COMMON = {"left": "upper", "right": "lower"}
P_COMMON = 0.7


def _softmax_pick(rng: random.Random, logits: list[float]) -> int:
    top = max(logits)
    weights = [math.exp(z - top) for z in logits]
    u = rng.random() * sum(weights)
    for i, wgt in enumerate(weights):
        u -= wgt
        if u < 0:
            return i
    return len(weights) - 1


def simulate_two_stage(p: dict, n_trials: int, seed: int, session: str = "s1", omission: float = 0.0) -> list[tuple]:
    """Rows (session, trial, choice, transition, state, choice2, reward); choice None on an
    omission (then transition, state and choice2 are None too)."""
    rng = random.Random(seed)
    q1 = {a: 0.0 for a in FIRST}
    q2 = {(s, o): 0.0 for s in STATES for o in OPTIONS[s]}
    prob = {k: rng.uniform(0.25, 0.75) for k in q2}
    prev = None
    rows = []
    for t in range(1, n_trials + 1):
        if rng.random() < omission:
            rows.append((session, t, None, None, None, None, 0.0))
        else:
            q_mb = {}
            for a in FIRST:
                other = STATES[1 - STATES.index(COMMON[a])]
                q_mb[a] = P_COMMON * max(q2[(COMMON[a], o)] for o in OPTIONS[COMMON[a]]) + (1 - P_COMMON) * max(
                    q2[(other, o)] for o in OPTIONS[other]
                )
            logits = [
                p["beta1"] * (p["w"] * q_mb[a] + (1 - p["w"]) * q1[a] + (p["persev"] if a == prev else 0.0))
                for a in FIRST
            ]
            a = FIRST[_softmax_pick(rng, logits)]
            common = rng.random() < P_COMMON
            s = COMMON[a] if common else STATES[1 - STATES.index(COMMON[a])]
            b = OPTIONS[s][_softmax_pick(rng, [p["beta2"] * q2[(s, o)] for o in OPTIONS[s]])]
            r = 1.0 if rng.random() < prob[(s, b)] else 0.0
            d1 = q2[(s, b)] - q1[a]
            d2 = r - q2[(s, b)]
            q1[a] += p["alpha1"] * d1
            q2[(s, b)] += p["alpha2"] * d2
            q1[a] += p["alpha1"] * p["lambda"] * d2
            prev = a
            rows.append((session, t, a, "common" if common else "rare", s, b, r))
        for k in prob:  # reflected Gaussian walk
            x = prob[k] + rng.gauss(0.0, 0.025)
            while x < 0.25 or x > 0.75:
                x = 0.5 - x if x < 0.25 else 1.5 - x
            prob[k] = x
    return rows


def reference_loglik(p: dict, rows: list[tuple], p_common: float = P_COMMON) -> float:
    """Log-likelihood of rows (as simulate_two_stage gives) one trial at a time; values and
    the previous choice start afresh each session; a second-stage omission (choice2 None
    in a state with options) counts the first choice and learns nothing."""
    ll, session = 0.0, object()
    q1: dict = {}
    q2: dict = {}
    prev = None
    for sess, _, a, _, s, b, r in rows:
        if sess != session:
            q1 = {x: 0.0 for x in FIRST}
            q2 = {(st, o): 0.0 for st in STATES for o in OPTIONS[st]}
            prev, session = None, sess
        if a is None:
            continue
        net = []
        for x in FIRST:
            other = STATES[1 - STATES.index(COMMON[x])]
            mb = p_common * max(q2[(COMMON[x], o)] for o in OPTIONS[COMMON[x]]) + (1 - p_common) * max(
                q2[(other, o)] for o in OPTIONS[other]
            )
            net.append(p["beta1"] * (p["w"] * mb + (1 - p["w"]) * q1[x] + (p["persev"] if x == prev else 0.0)))
        top = max(net)
        ll += net[FIRST.index(a)] - top - math.log(sum(math.exp(z - top) for z in net))
        prev = a
        if b is None:
            continue
        z2 = [p["beta2"] * q2[(s, o)] for o in OPTIONS[s]]
        top = max(z2)
        ll += z2[OPTIONS[s].index(b)] - top - math.log(sum(math.exp(z - top) for z in z2))
        d1 = q2[(s, b)] - q1[a]
        d2 = r - q2[(s, b)]
        q1[a] += p["alpha1"] * (d1 + p["lambda"] * d2)
        q2[(s, b)] += p["alpha2"] * d2
    return ll
