"""Clock sync: offset and drift recovered from synthetic jittered round trips."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from server.link.clock_sync import ClockSync
from server.link.unwrap import WRAP, DeviceClockUnwrapper

OFFSET_S = 81_234.567_891  # host monotonic time when the device counter read 0
DRIFT = 50e-6  # the host clock runs 50 ppm faster than the device's


def true_host(device_s: float) -> float:
    return OFFSET_S + (1.0 + DRIFT) * device_s


def true_device_us(host_s: float) -> int:
    return round((host_s - OFFSET_S) / (1.0 + DRIFT) * 1e6)


def round_trips(rng, n=120, period_s=1.0, start_device_s=10.0, spikes=0.0):
    """Pings once a period; each leg 0.15 ms plus exponential jitter (mean 0.4 ms), and with
    probability `spikes` the reply held up a further 5-50 ms (queued behind event lines)."""
    out = []
    t = true_host(start_device_s)
    for _ in range(n):
        t += period_s * (1 + rng.uniform(-0.05, 0.05))
        legs = 0.00015 + rng.exponential(0.0004, 2)
        if rng.random() < spikes:
            legs[1] += rng.uniform(0.005, 0.05)
        out.append((t, true_device_us(t + legs[0]), t + legs[0] + legs[1]))
    return out


def test_offset_within_half_a_millisecond_and_drift_recovered():
    rng = np.random.default_rng(11)
    sync = ClockSync()
    samples = round_trips(rng)
    for s in samples:
        sync.add(*s)
    fit = sync.fit()
    assert fit is not None
    # Across the window and 10 s beyond it, device times map to host times within 0.5 ms.
    last_device_s = samples[-1][1] * 1e-6
    for device_s in np.linspace(10.0, last_device_s + 10.0, 50):
        assert abs(sync.to_host(round(device_s * 1e6)) - true_host(device_s)) < 0.0005
    assert fit.drift_ppm == pytest.approx(50.0, abs=3.0)


def test_minimum_delay_filter_rejects_congested_round_trips():
    rng = np.random.default_rng(12)
    samples = round_trips(rng, spikes=0.3)
    sync = ClockSync()
    for s in samples:
        sync.add(*s)
    for probe_s in np.linspace(samples[0][1], samples[-1][1], 20) * 1e-6:
        assert abs(sync.to_host(round(probe_s * 1e6)) - true_host(probe_s)) < 0.0005
    # Least squares over every sample (scipy.stats.linregress) is thrown off by the slow
    # ones, by milliseconds: the filter is what makes the estimate good.
    naive = stats.linregress([s[1] * 1e-6 for s in samples], [(s[0] + s[2]) / 2 for s in samples])
    probe_s = samples[60][1] * 1e-6
    assert abs(naive.intercept + naive.slope * probe_s - true_host(probe_s)) > 0.002


def test_fit_matches_scipy_linregress_on_the_kept_samples():
    # General-purpose reference: scipy.stats.linregress, ordinary least squares.
    rng = np.random.default_rng(13)
    sync = ClockSync(window=200, keep=0.2)
    for s in round_trips(rng, n=200):
        sync.add(*s)
    kept = sync.selected()
    assert 30 <= len(kept) <= 40  # one per group of 5, less the odd slow group
    x = np.array([s.device_us for s in kept], dtype=float) * 1e-6
    y = np.array([s.midpoint_s for s in kept])
    ref = stats.linregress(x, y)
    fit = sync.fit()
    assert fit.rate == pytest.approx(ref.slope, rel=1e-9)
    assert fit.to_host(kept[0].device_us) == pytest.approx(ref.intercept + ref.slope * x[0], abs=1e-7)


def test_kept_samples_are_the_fastest_of_each_part_of_the_window():
    sync = ClockSync(window=8, keep=0.5)
    delays = [5, 1, 3, 4, 9, 2, 6, 7]  # ms; groups of two in time order
    for i, d in enumerate(delays):
        sync.add(i, i * 1_000_000, i + d / 1000)
    # Group minima 1, 3, 2, 6; their median is 2.5, so 6 (over twice that) is dropped too.
    assert [round(s.delay_s * 1000) for s in sync.selected()] == [1, 3, 2]
    sync.add(8, 8_000_000, 8.0005)  # window of 8 slides: the first sample leaves
    assert len(sync) == 8 and sync.selected()[0].sent_s == 1


def test_short_span_assumes_no_drift_and_one_sample_gives_offset():
    sync = ClockSync(min_span_s=2.0)
    sync.add(100.0, 5_000_000, 100.002)
    fit = sync.fit()
    assert fit.rate == 1.0 and fit.offset_s == pytest.approx(95.001)
    assert sync.to_host(6_000_000) == pytest.approx(101.001)
    sync.add(101.0, 6_000_500, 101.000)  # only 1 s of device time: still rate 1
    assert sync.fit().rate == 1.0


def test_sync_holds_across_the_device_counter_wrap():
    rng = np.random.default_rng(14)
    unwrap = DeviceClockUnwrapper()
    sync = ClockSync()
    start_s = (WRAP - 60_000_000) * 1e-6  # the counter wraps a minute into the window
    for sent, device_us, received in round_trips(rng, start_device_s=start_s):
        sync.add(sent, unwrap.unwrap(device_us % WRAP), received)
    after_wrap_s = start_s + 100.0
    assert abs(sync.to_host(round(after_wrap_s * 1e6)) - true_host(after_wrap_s)) < 0.0005


def test_errors_are_short_and_specific():
    sync = ClockSync()
    with pytest.raises(ValueError, match="clock not synchronised yet"):
        sync.to_host(0)
    with pytest.raises(ValueError, match="round trip ends before it starts"):
        sync.add(2.0, 0, 1.0)
    with pytest.raises(ValueError, match="window >= 1"):
        ClockSync(window=0)
