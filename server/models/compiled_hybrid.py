"""The hybrid learner's trial update compiled (numba): one call runs many trials for every particle.

Why compiled. The particle estimator runs the hybrid update once per trial for the live
particles and, while a move is pending, up to `catch_up` more trials for the proposals: in
numpy every one of those trials is some sixty array operations whose fixed cost (not the
arithmetic) dominated at the estimator's 2,048 particles. Here a trial is a few scalar
operations per particle inside one compiled loop, and a run of trials is one call.

The numpy `two_stage.hybrid_step` stays the reference: it is what the offline fit runs, and
the tests check this kernel against it trial by trial (tests/models/test_compiled_hybrid.py).
Same equations (Daw et al. 2011, eqs. 1-4), same handling of omissions: a trial with
`choice < 0` is skipped; `slot < 0` (a missed second stage) counts the first-stage choice in
the likelihood and as the previous choice but learns nothing.

Two-way softmaxes (every two-option stage) use log P = -log(1 + exp(-|g|)) - max(g, 0) with
the two stages' logarithms taken together, so a trial costs two exponentials and one
logarithm per particle. Compiled once per machine (`cache=True` keeps the machine code beside
this file); the first import in a fresh install compiles it, a few seconds, which the lab
pays when it builds its sessions, before any box runs.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

# theta rows, in this order (two_stage.HYBRID_PARAMS names)
THETA_ROWS = ("alpha1", "alpha2", "lambda", "beta1", "beta2", "w", "persev")


@njit(cache=True, nogil=True)
def hybrid_trials(theta, q1, q2, prev, trans, n_slots, choice, state, slot, reward, weight, ll):  # pragma: no cover
    """Run trials (choice, state, slot, reward: one entry each) for every particle, in place.

    theta (7, N) rows as THETA_ROWS; q1 (K1, N), q2 (S, B, N), prev (K1, N) updated in place;
    trans (K1, S); n_slots (S,) options per state (1 for a single response); ll (N,) gets
    weight * log P(what the animal did) added per trial."""
    k1n, n_par = q1.shape
    s_n = q2.shape[0]
    best = np.empty(s_n)
    logits = np.empty(k1n)
    trials = choice.shape[0]
    for n in range(n_par):
        a1 = theta[0, n]
        a2 = theta[1, n]
        lam = theta[2, n]
        b1 = theta[3, n]
        b2 = theta[4, n]
        w = theta[5, n]
        pe = theta[6, n]
        acc = 0.0
        for t in range(trials):
            c = choice[t]
            if c < 0:
                continue
            # model-based first-stage values: sum_s P(s | a) max_b Q2(s, b)
            for s in range(s_n):
                m = q2[s, 0, n]
                for b in range(1, n_slots[s]):
                    if q2[s, b, n] > m:
                        m = q2[s, b, n]
                best[s] = m
            for k in range(k1n):
                mb = 0.0
                for s in range(s_n):
                    mb += trans[k, s] * best[s]
                logits[k] = b1 * (w * mb + (1.0 - w) * q1[k, n] + pe * prev[k, n])
            # log P(first choice) (lp) as -(shift + log(product)): the product gathers the
            # two-way softmaxes' 1 + exp(-|g|) factors so that one logarithm serves both stages
            product = 1.0
            shift = 0.0
            if k1n == 2:
                g = logits[1 - c] - logits[c]
                if g > 0.0:
                    shift += g
                    product *= 1.0 + math.exp(-g)
                else:
                    product *= 1.0 + math.exp(g)
            else:
                top = logits[0]
                for k in range(1, k1n):
                    if logits[k] > top:
                        top = logits[k]
                total = 0.0
                for k in range(k1n):
                    total += math.exp(logits[k] - top)
                shift += top - logits[c]
                product *= total
            s = state[t]
            b = slot[t]
            if b >= 0:
                ns = n_slots[s]
                if ns == 2:
                    g = b2 * (q2[s, 1 - b, n] - q2[s, b, n])
                    if g > 0.0:
                        shift += g
                        product *= 1.0 + math.exp(-g)
                    else:
                        product *= 1.0 + math.exp(g)
                elif ns > 2:
                    top = b2 * q2[s, 0, n]
                    for j in range(1, ns):
                        if b2 * q2[s, j, n] > top:
                            top = b2 * q2[s, j, n]
                    total = 0.0
                    for j in range(ns):
                        total += math.exp(b2 * q2[s, j, n] - top)
                    shift += top - b2 * q2[s, b, n]
                    product *= total
                # SARSA(lambda): delta1 = Q2(s, b) - Q_MF(a), delta2 = r - Q2(s, b)
                q2t = q2[s, b, n]
                d1 = q2t - q1[c, n]
                d2 = reward[t] - q2t
                q1[c, n] += a1 * (d1 + lam * d2)
                q2[s, b, n] += a2 * d2
            for k in range(k1n):
                prev[k, n] = 0.0
            prev[c, n] = 1.0
            acc -= weight[t] * (shift + math.log(product))
        ll[n] += acc


def pack_theta(full: dict[str, np.ndarray | float], n: int) -> np.ndarray:
    """(7, n) C-ordered parameter rows for `hybrid_trials` from a variant's full theta."""
    out = np.empty((len(THETA_ROWS), n))
    for i, name in enumerate(THETA_ROWS):
        out[i] = full[name]
    return out
