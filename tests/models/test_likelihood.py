"""Likelihoods and fits against an independent implementation, scipy and statsmodels."""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from model_simulation import MODELS, as_rows, reference_loglik, simulate, two_armed_reversal
from scipy import optimize, stats

from server.models import CHOICE_MODELS, ValueSettings, encode_animal, fit_animals, regressors
from server.models.batch import loglik
from server.models.fitting import FitResult
from server.models.trials import stack_animals

GENERATING = {
    "q_learning": {"alpha": 0.35, "beta": 4.0},
    "q_dual_rate": {"alpha_pos": 0.6, "alpha_neg": 0.15, "beta": 5.0},
    "q_sticky": {"alpha": 0.3, "beta": 4.0, "kappa": 1.5},
    "q_forgetting": {"alpha": 0.4, "beta": 5.0, "decay": 0.3},
}


def _animal_trials(model: str, seed: int, sessions: int = 2, n: int = 120):
    """Two sessions of a three-armed task with omissions, as (session, label, reward)."""
    rng = np.random.default_rng(seed)
    p = {k: np.array([v]) for k, v in GENERATING[model].items()}
    trials = []
    for s in range(sessions):
        ch, rw = simulate(model, p, n, rng, omission=0.08)
        trials += [(f"d{s}", c, r) for (_, _, c, r) in as_rows(ch, rw)[0]]
    return trials


def _encode(trials, animal="R1"):
    return encode_animal(animal, [(s, i + 1, c, r) for i, (s, c, r) in enumerate(trials)])


def _batch_loglik(model, params, animal, q0=0.0):
    theta = {k: np.array([[v]]) for k, v in params.items()}
    return float(loglik(CHOICE_MODELS[model], theta, stack_animals([animal]), (1,), ValueSettings(q0=q0))[0, 0])


@pytest.mark.parametrize("model", MODELS)
def test_likelihood_equals_independent_implementation(model):
    trials = _animal_trials(model, seed=11)
    animal = _encode(trials)
    rng = np.random.default_rng(3)
    for _ in range(5):
        params = {p.name: float(p.from_unit(rng.uniform(0.05, 0.95))) for p in CHOICE_MODELS[model].params}
        # reference: plain-Python restatement in model_simulation.py (to 1e-9)
        assert _batch_loglik(model, params, animal) == pytest.approx(reference_loglik(model, params, trials), abs=1e-9)


@pytest.mark.parametrize("model", MODELS)
def test_maximum_likelihood_reaches_the_scipy_optimum(model):
    trials = _animal_trials(model, seed=21, sessions=1, n=200)
    declared = CHOICE_MODELS[model].params
    names = [p.name for p in declared]
    bounds = [(p.low, p.high) for p in declared]

    def nll(x):
        return -reference_loglik(model, dict(zip(names, x)), trials)

    # scipy.optimize.minimize, L-BFGS-B from several starts (general-purpose reference)
    rng = np.random.default_rng(0)
    best = math.inf
    for _ in range(6):
        x0 = [float(p.from_unit(rng.uniform(0.1, 0.9))) for p in declared]
        res = optimize.minimize(nll, x0, method="L-BFGS-B", bounds=bounds)
        best = min(best, float(res.fun))
    fit = fit_animals(CHOICE_MODELS[model], [_encode(trials)])[0]
    assert fit.loglik >= -best - 1e-6  # no worse than scipy's best
    assert fit.loglik == pytest.approx(-best, abs=1e-3)
    # the reported log-likelihood is the independent one at the reported parameters
    assert fit.loglik == pytest.approx(reference_loglik(model, fit.params, trials), abs=1e-9)
    assert fit.n_trials == sum(c is not None for _, c, _ in trials)


def test_map_fit_maximises_likelihood_plus_scipy_priors():
    trials = _animal_trials("q_learning", seed=5, sessions=1, n=150)

    def neg_post(x):
        # priors from scipy.stats: Beta(1.1, 1.1) and Gamma(1.2, scale 5) (Daw 2011, from
        # memory), as declared by the model
        prior = stats.beta.logpdf(x[0], 1.1, 1.1) + stats.gamma.logpdf(x[1], 1.2, scale=5.0)
        return -(reference_loglik("q_learning", {"alpha": x[0], "beta": x[1]}, trials) + prior)

    best = min(
        (
            optimize.minimize(neg_post, x0, method="L-BFGS-B", bounds=[(1e-6, 1 - 1e-6), (0.01, 50)])
            for x0 in ([0.2, 2.0], [0.5, 5.0], [0.8, 10.0])
        ),
        key=lambda r: r.fun,
    )
    fit = fit_animals(CHOICE_MODELS["q_learning"], [_encode(trials)], use_prior=True)[0]
    assert fit.objective == "map"
    assert fit.loglik + fit.log_prior == pytest.approx(-best.fun, abs=1e-5)
    assert fit.loglik + fit.log_prior >= -best.fun - 1e-6
    assert [fit.params["alpha"], fit.params["beta"]] == pytest.approx(best.x, rel=1e-3)


def test_fixed_alpha_beta_equals_statsmodels_logit_slope():
    # With alpha fixed, the two-option softmax is a logistic regression of choice on dQ
    # with slope beta and no intercept: statsmodels Logit is the reference.
    alpha = 0.3
    rng = np.random.default_rng(8)
    ch, rw = simulate(
        "q_learning", {"alpha": np.array([alpha]), "beta": np.array([3.0])}, 400, rng, schedule=two_armed_reversal
    )
    q = [0.0, 0.0]
    dq, chose_first = [], []
    for c, r in zip(ch[0], rw[0]):  # values by hand (Sutton & Barto 2018, ch. 2)
        dq.append(q[0] - q[1])
        chose_first.append(1.0 if c == 0 else 0.0)
        q[c] += alpha * (r - q[c])
    logit = sm.Logit(np.array(chose_first), np.array(dq)[:, None]).fit(disp=0, tol=1e-12)
    animal = encode_animal("R2", as_rows(ch, rw, labels="LR")[0], options=("L", "R"))
    fit = fit_animals(CHOICE_MODELS["q_learning"], [animal], fixed={"alpha": alpha})[0]
    assert fit.k == 1
    assert fit.params["beta"] == pytest.approx(float(logit.params[0]), rel=1e-5)
    assert fit.loglik == pytest.approx(float(logit.llf), abs=1e-7)


def test_bic_worked_example():
    # Wilson & Collins (2019), eLife 8:e49547 (CHECKS.md): Q0 = 0.5, alpha = 0.5, beta = 3;
    # choices 1,1,2,1; rewards 1,0,1,1 -> p = 0.5, 0.679179, 0.592667, 0.245085;
    # NLL 3.009292; BIC 8.791172; AIC 10.018583. An omission adds nothing.
    rows = [("s", 1, "1", 1.0), ("s", 2, "1", 0.0), ("s", 3, None, 0.0), ("s", 4, "2", 1.0), ("s", 5, "1", 1.0)]
    animal = encode_animal("W", rows)
    params = {"alpha": 0.5, "beta": 3.0}
    reg = regressors(CHOICE_MODELS["q_learning"], animal, params, ValueSettings(q0=0.5))
    made = animal.choice >= 0
    p_chosen = reg.p_choice[np.flatnonzero(made), animal.choice[made]]
    assert p_chosen == pytest.approx([0.5, 0.679179, 0.592667, 0.245085], abs=5e-7)
    ll = _batch_loglik("q_learning", params, animal, q0=0.5)
    assert -ll == pytest.approx(3.009292, abs=5e-7)
    result = FitResult("W", "q_learning", params, {}, ll, animal.n_choices, 2, "ml")
    assert result.n_trials == 4
    assert result.bic == pytest.approx(8.791172, abs=5e-7)
    assert result.aic == pytest.approx(10.018583, abs=5e-7)
    assert np.isnan(reg.prediction_error[2])
    assert reg.prediction_error[0] == pytest.approx(0.5)


def test_values_reset_each_session_unless_carried():
    trials = _animal_trials("q_learning", seed=2)
    animal = _encode(trials)
    params = GENERATING["q_learning"]
    m = CHOICE_MODELS["q_learning"]
    fresh = regressors(m, animal, params)
    carried = regressors(m, animal, params, ValueSettings(carry_values=True))
    second = animal.session.index("d1")
    assert np.all(fresh.values[second] == 0.0)
    assert np.any(carried.values[second] != 0.0)
    assert np.all(fresh.values[:second] == carried.values[:second])


def test_a_flat_direction_gives_no_interval_instead_of_failing():
    # An eigenvalue of ~1e-300 next to 1: positive, but the inverse overflows (numpy raises
    # "Singular matrix"); the fit reports no interval for that animal instead.
    from server.models.choice import get_choice_model
    from server.models.fitting import wald_intervals

    free = list(get_choice_model("q_learning").params)
    u = np.array([[0.4, 0.5]])
    grad = np.zeros((1, 2))
    hess = np.array([[[1.0, 0.0], [0.0, 1e-300]]])
    assert wald_intervals(free, u, grad, hess) == [{p.name: None for p in free}]
