"""Schedules and duration draws against their published definitions."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from server.engine.timing import DurationDraw, ScheduleState, fleshler_hoffman, truncated_exponential
from server.protocol.model import Duration, Schedule


def test_fleshler_hoffman_worked_values():
    # Fleshler & Hoffman (1962), J. Exp. Anal. Behav. 5:529-530; worked numbers as listed in
    # the project's CHECKS table for T = 30 s.
    assert fleshler_hoffman(30, 5) == pytest.approx([3.223, 10.803, 20.997, 36.694, 78.283], abs=1e-3)
    assert fleshler_hoffman(30, 12) == pytest.approx(
        [1.286, 4.017, 7.022, 10.363, 14.122, 18.423, 23.446, 29.487, 37.067, 47.261, 62.958, 104.547],
        abs=1e-3,
    )


@pytest.mark.parametrize("n", [2, 5, 12, 20, 100])
def test_fleshler_hoffman_mean_is_exactly_t_and_last_is_t_one_plus_ln_n(n):
    # The sum telescopes to N*T (Fleshler & Hoffman 1962), and t_N = T(1 + ln N).
    values = fleshler_hoffman(17.5, n)
    assert sum(values) / n == pytest.approx(17.5, rel=1e-12)
    assert values[-1] == pytest.approx(17.5 * (1 + math.log(n)), rel=1e-12)
    assert values == sorted(values)


def test_truncated_exponential_matches_scipy_truncexpon():
    # Reference: scipy.stats.truncexpon with b = (max-min)/mean, loc = min, scale = mean.
    rng = np.random.default_rng(3)
    low, high, mean = 2.0, 15.0, 4.0
    draws = np.array([truncated_exponential(rng, mean, low, high) for _ in range(20000)])
    assert draws.min() >= low and draws.max() <= high
    reference = stats.truncexpon(b=(high - low) / mean, loc=low, scale=mean)
    assert stats.kstest(draws, reference.cdf).pvalue > 0.001
    assert draws.mean() == pytest.approx(reference.mean(), rel=0.02)


def test_duration_forms():
    rng = np.random.default_rng(1)
    uniform = DurationDraw(Duration("uniform", low=4, high=8), rng)
    assert all(4 <= uniform.draw() <= 8 for _ in range(1000))
    bag = DurationDraw(Duration("list", values=(1.0, 2.0, 3.0), shuffled=True), rng)
    first_six = [bag.draw() for _ in range(6)]
    assert sorted(first_six[:3]) == [1, 2, 3] and sorted(first_six[3:]) == [1, 2, 3]
    cycle = DurationDraw(Duration("list", values=(5.0, 7.0), shuffled=False), rng)
    assert [cycle.draw() for _ in range(4)] == [5, 7, 5, 7]
    assert DurationDraw(Duration.fixed(2.5), rng).draw() == 2.5


def _responses_to_reward(kind: str, value: float, times, seed=0, intervals=12):
    """Respond at the given times; return the index of the reinforced responses."""
    state = ScheduleState(Schedule("p", kind, value, intervals), np.random.default_rng(seed))
    state.begin(0.0)
    earned = []
    for i, t in enumerate(times):
        if state.respond(t):
            earned.append(i)
            state.begin(t)
    return earned


def test_fixed_ratio_reinforces_every_nth_response():
    # FR n: every n-th response reinforced (Ferster & Skinner 1957).
    assert _responses_to_reward("FR", 5, range(20)) == [4, 9, 14, 19]


def test_variable_ratio_mean_requirement():
    # VR n: requirement varies with mean n (Ferster & Skinner 1957).
    earned = _responses_to_reward("VR", 10, range(20000), seed=4)
    gaps = np.diff([-1] + earned)
    assert gaps.mean() == pytest.approx(10, rel=0.05)
    assert gaps.min() >= 1 and gaps.max() <= 19 and len(set(gaps)) > 5


def test_random_ratio_is_a_constant_probability():
    # RR p: each response reinforced with probability p (Ferster & Skinner 1957); checked with
    # an exact binomial test from scipy.
    earned = _responses_to_reward("RR", 0.1, range(10000), seed=5)
    assert stats.binomtest(len(earned), 10000, 0.1).pvalue > 0.001


def test_fixed_interval_first_response_after_t():
    # FI t: the first response after t s is reinforced (Ferster & Skinner 1957).
    times = [1, 5, 9.9, 10.0, 11, 15, 20.5, 21]
    assert _responses_to_reward("FI", 10, times) == [3, 6]


def test_variable_interval_uses_the_fleshler_hoffman_list():
    # VI t: intervals drawn without replacement from the Fleshler-Hoffman list of mean t.
    state = ScheduleState(Schedule("p", "VI", 30, 5), np.random.default_rng(2))
    armed = []
    for _ in range(5):
        state.begin(0.0)
        armed.append(state.armed_at)
    assert sorted(armed) == pytest.approx(fleshler_hoffman(30, 5))
