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


@njit(cache=True, nogil=True, inline="always")
def _particle(theta, n):  # pragma: no cover
    """One particle's parameters, in THETA_ROWS order."""
    return theta[0, n], theta[1, n], theta[2, n], theta[3, n], theta[4, n], theta[5, n], theta[6, n]


@njit(cache=True, nogil=True)
def hybrid_trials(theta, q1, q2, prev, trans, n_slots, choice, state, slot, reward, weight, ll):  # pragma: no cover
    """Run trials (choice, state, slot, reward: one entry each) for every particle, in place.

    theta (7, N) rows as THETA_ROWS; q1 (K1, N), q2 (S, B, N), prev (K1, N) updated in place;
    trans (K1, S); n_slots (S,) options per state (1 for a single response); ll (N,) gets
    weight (a number: one session's tempering exponent) x the trials' summed log P added."""
    k1n, n_par = q1.shape
    s_n = q2.shape[0]
    best = np.empty(s_n)
    logits = np.empty(k1n)
    trials = choice.shape[0]
    for n in range(n_par):
        a1, a2, lam, b1, b2, w, pe = _particle(theta, n)
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
            acc -= shift + math.log(product)
        ll[n] += weight * acc


@njit(cache=True, nogil=True)
def hybrid_trials_2x2(theta, q1, q2, prev, trans, n_slots, choice, state, slot, reward, weight, ll):  # pragma: no cover
    """`hybrid_trials` for the common shape: two first-stage options and two states of one or
    two options each. The same arithmetic with every value in a local, about twice as fast."""
    n_par = q1.shape[1]
    t00 = trans[0, 0]
    t01 = trans[0, 1]
    t10 = trans[1, 0]
    t11 = trans[1, 1]
    two0 = n_slots[0] == 2
    two1 = n_slots[1] == 2
    trials = choice.shape[0]
    for n in range(n_par):
        a1, a2, lam, b1, b2, w, pe = _particle(theta, n)
        x0 = q1[0, n]
        x1 = q1[1, n]
        p0 = prev[0, n]
        p1 = prev[1, n]
        y00 = q2[0, 0, n]
        y10 = q2[1, 0, n]
        y01 = q2[0, 1, n] if two0 else 0.0
        y11 = q2[1, 1, n] if two1 else 0.0
        acc = 0.0
        total_shift = 0.0
        total_product = 1.0
        for t in range(trials):
            c = choice[t]
            if c < 0:
                continue
            m0 = max(y00, y01) if two0 else y00
            m1 = max(y10, y11) if two1 else y10
            # logit of option 1 minus option 0; g: the other option's minus the chosen one's
            d = b1 * (w * ((t10 - t00) * m0 + (t11 - t01) * m1) + (1.0 - w) * (x1 - x0) + pe * (p1 - p0))
            g = d if c == 0 else -d
            shift = max(g, 0.0)
            product = 1.0 + math.exp(-abs(g))
            s = state[t]
            b = slot[t]
            if b >= 0:
                if s == 0:
                    qa = y01 if b == 1 else y00
                    qo = y00 if b == 1 else y01
                    two = two0
                else:
                    qa = y11 if b == 1 else y10
                    qo = y10 if b == 1 else y11
                    two = two1
                if two:
                    g2 = b2 * (qo - qa)
                    shift += max(g2, 0.0)
                    product *= 1.0 + math.exp(-abs(g2))
                d2 = reward[t] - qa
                if c == 0:
                    x0 += a1 * (qa - x0 + lam * d2)
                else:
                    x1 += a1 * (qa - x1 + lam * d2)
                qa += a2 * d2
                if s == 0:
                    if b == 1:
                        y01 = qa
                    else:
                        y00 = qa
                elif b == 1:
                    y11 = qa
                else:
                    y10 = qa
            p0 = 1.0 if c == 0 else 0.0
            p1 = 1.0 - p0
            # the factors (each at most 2) multiply on over trials: one logarithm per run of
            # them, taken well before the product could overflow
            total_shift += shift
            total_product *= product
            if total_product > 1e150:
                acc -= total_shift + math.log(total_product)
                total_shift = 0.0
                total_product = 1.0
        acc -= total_shift + math.log(total_product)
        q1[0, n] = x0
        q1[1, n] = x1
        prev[0, n] = p0
        prev[1, n] = p1
        q2[0, 0, n] = y00
        q2[1, 0, n] = y10
        if two0:
            q2[0, 1, n] = y01
        if two1:
            q2[1, 1, n] = y11
        ll[n] += weight * acc


def kernel_for(first: int, n_slots: np.ndarray):
    """The fastest of the two kernels that fits the task's shape."""
    if first == 2 and len(n_slots) == 2 and int(n_slots.max()) <= 2:
        return hybrid_trials_2x2
    return hybrid_trials


def pack_theta(full: dict[str, np.ndarray | float], n: int) -> np.ndarray:
    """(7, n) C-ordered parameter rows for `hybrid_trials` from a variant's full theta."""
    out = np.empty((len(THETA_ROWS), n))
    for i, name in enumerate(THETA_ROWS):
        out[i] = full[name]
    return out
