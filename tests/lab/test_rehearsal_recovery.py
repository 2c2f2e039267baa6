"""The rehearsal's recovery summary: estimates against the traits the animals drew."""

from __future__ import annotations

import numpy as np
from scipy import stats

from server.lab.rehearsal import recovery


def test_recovery_matches_scipy_and_counts_coverage_by_hand():
    rng = np.random.default_rng(4)
    truth = rng.uniform(0, 1, 40)
    means = truth + rng.normal(0, 0.2, 40)
    results = [
        {
            "params": {"w": float(t), "lam": 0.6},
            "estimate": {"w": {"mean": float(m), "low": float(m) - 0.3, "high": float(m) + 0.3}},
        }
        for t, m in zip(truth, means)
    ]
    fit = recovery(results)["w"]
    # Pearson r against scipy's (the outside reference), coverage counted here by hand
    assert fit["pearson_r"] == round(float(stats.pearsonr(truth, means).statistic), 4)
    assert fit["coverage_95"] == round(float(np.mean(np.abs(truth - means) <= 0.3)), 4)
    assert fit["animals"] == 40
    assert "lam" not in recovery(results)  # a trait the model does not estimate by that name


def test_a_fixed_trait_has_no_correlation():
    results = [
        {"params": {"w": 0.5}, "estimate": {"w": {"mean": 0.4 + i / 100, "low": 0.1, "high": 0.9}}} for i in range(5)
    ]
    assert recovery(results)["w"] == {"animals": 5, "pearson_r": None, "coverage_95": 1.0}
