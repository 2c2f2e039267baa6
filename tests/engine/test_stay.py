"""The stay analysis of two-stage trials: counts by hand, Wilson intervals and the logistic
regression against statsmodels."""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.stats.proportion import proportion_confint

from server.engine.records import SecondStage, TrialRecord
from server.engine.stay import (
    regressor_names,
    stay_analysis,
    stay_counts,
    stay_from_records,
    stay_pairs,
    wilson_interval,
)


def test_cells_counted_by_hand():
    # trials: (choice, common, rewarded); s2 starts afresh. A pair (t-1, t) counts when t
    # has a first choice and t-1 had one whose second stage played out.
    choices = ["L", "L", "R", None, "R", "L", "L", "R", "R"]
    common = [True, False, True, None, True, False, True, True, False]
    rewarded = [True, False, True, None, None, True, False, True, True]
    sessions = ["s1", "s1", "s1", "s1", "s1", "s1", "s2", "s2", "s2"]
    # s1: (1,2) after c+ stay; (2,3) after r- switch; (3,4) t is an omission; (4,5) t-1 is;
    # (5,6) t-1 had no outcome. s2: (7,8) after c- switch; (8,9) after c+ stay
    s = stay_analysis(choices, common, rewarded, sessions)
    assert (s.cell(True, True).pairs, s.cell(True, True).stays) == (2, 2)
    assert (s.cell(False, False).pairs, s.cell(False, False).stays) == (1, 0)
    assert (s.cell(False, True).pairs, s.cell(False, True).stays) == (1, 0)
    assert s.cell(True, False).pairs == 0 and s.cell(True, False).p is None
    assert s.regression is None  # 4 pairs cannot fit 4 coefficients
    assert stay_pairs(choices, common, rewarded, sessions) == [1, 2, 7, 8]
    assert stay_pairs(choices, common, rewarded, sessions, lags=2) == [2, 8]


def test_a_singular_design_is_flagged():
    # no rewarded-rare pair among six: the design is singular, which the regression says
    choices = ["L", "L", "R", "R", "L", "L", "R"]
    common = [True, False, True, True, False, True, True]
    rewarded = [True, False, True, False, False, True, True]
    reg = stay_analysis(choices, common, rewarded).regression
    assert reg is not None and not reg.converged and math.isnan(reg["reward"].se)


def test_wilson_interval_matches_statsmodels():
    for k, n in ((0, 10), (3, 10), (47, 60), (60, 60), (1, 1)):
        lo, hi = proportion_confint(k, n, alpha=0.05, method="wilson")
        assert wilson_interval(k, n) == pytest.approx((lo, hi), abs=1e-12)


def _random_session(rng, n):
    choices, common, rewarded = [], [], []
    prev = "L"
    for _ in range(n):
        r, c = rng.random() < 0.5, rng.random() < 0.7
        choices.append(prev)
        common.append(c)
        rewarded.append(r)
        # a learner that stays more after rewarded-common trials (plus noise)
        p_stay = 0.5 + 0.25 * (1 if r else -1) * (1 if c else -1) + 0.1 * (1 if r else -1)
        prev = prev if rng.random() < p_stay else ("R" if prev == "L" else "L")
    return choices, common, rewarded


@pytest.mark.parametrize("lags", [1, 3])
def test_regression_matches_statsmodels_logit(lags):
    rng = np.random.default_rng(2)
    choices, common, rewarded = _random_session(rng, 600)
    s = stay_analysis(choices, common, rewarded, lags=lags)
    # the design written out again here: +1/-1 coding, past trials signed by whether their
    # choice was the last one
    x, y = [], []
    for t in range(lags, len(choices)):
        row = [1.0]
        for k in range(1, lags + 1):
            sign = 1.0 if choices[t - k] == choices[t - 1] else -1.0
            r = 1.0 if rewarded[t - k] else -1.0
            c = 1.0 if common[t - k] else -1.0
            row += ([sign] if k > 1 else []) + [sign * r, sign * c, sign * r * c]
        x.append(row)
        y.append(1.0 if choices[t] == choices[t - 1] else 0.0)
    ref = sm.Logit(np.array(y), np.array(x)).fit(disp=0)
    reg = s.regression
    assert reg is not None and reg.converged and reg.n == len(y)
    assert [c.name for c in reg.coefficients] == regressor_names(lags)
    assert [c.estimate for c in reg.coefficients] == pytest.approx(list(ref.params), abs=1e-8)
    assert [c.se for c in reg.coefficients] == pytest.approx(list(ref.bse), rel=1e-6)
    assert [c.p_value for c in reg.coefficients] == pytest.approx(list(ref.pvalues), rel=1e-5, abs=1e-300)
    assert reg.loglik == pytest.approx(ref.llf, abs=1e-8)
    assert reg["reward:transition"].estimate > 0


def test_separation_is_flagged_not_hidden():
    # always stays: the outcome is perfectly predicted, the MLE does not exist
    n = 40
    s = stay_analysis(["L"] * n, [i % 3 != 0 for i in range(n)], [i % 2 == 0 for i in range(n)])
    assert s.regression is not None and not s.regression.converged


def _record(i, choice, state, common, rewarded, omitted=False):
    return TrialRecord(
        i, "main", 1, "two_stage", float(i), i + 0.5, choice, None, 0.3, rewarded, float(rewarded), None,
        choice is None, False, 2.0, second=None if choice is None else SecondStage(state, common, omitted=omitted),
    )  # fmt: skip


def test_from_records_counts_like_the_rules_and_the_page():
    recs = [
        _record(1, "left", "upper", True, True),
        _record(2, "left", "lower", False, False),
        _record(3, "right", "lower", True, False),
        _record(4, None, None, True, False),
        _record(5, "right", "lower", True, False, omitted=True),
        _record(6, "right", "upper", False, True),
        _record(7, "left", "upper", True, True),
    ]
    s = stay_from_records(recs)
    # (1,2) after c+ stay; (2,3) after r- switch; (3,4) omission; (4,5) after an omission;
    # (5,6) after a missed second stage; (6,7) after r+ switch
    assert {k: (c.stays, c.pairs) for k, c in s.counts.items()} == {
        (True, True): (1, 1), (False, False): (0, 1), (False, True): (0, 0), (True, False): (0, 1),
    }  # fmt: skip
    assert s.counts == stay_counts(recs)
    assert math.isnan(wilson_interval(0, 0)[0])
