"""One suite over every model: declarations, update shapes, omissions, error messages."""

from __future__ import annotations

import math

import numpy as np
import pytest

from server.models import CHOICE_MODELS, RESCORLA_WAGNER, encode_animal
from server.models.batch import loglik
from server.models.choice import get_choice_model, log_choice_probability
from server.models.params import ParamError
from server.models.trials import stack_animals

ALL = list(CHOICE_MODELS.values()) + [RESCORLA_WAGNER]


@pytest.mark.parametrize("model", ALL, ids=lambda m: m.name)
def test_declarations_are_valid(model):
    names = [p.name for p in model.params]
    assert len(set(names)) == len(names)
    for p in model.params:
        assert p.low < p.high and p.scale in ("linear", "log") and p.grid >= 2 and p.doc
        lo, hi = p.grid_range()
        assert p.low <= lo < hi <= p.high
        if p.scale == "log":
            assert p.low > 0
        inside = p.from_unit(np.linspace(0.01, 0.99, 9))
        assert np.all((inside >= p.low) & (inside <= p.high))
        assert np.isfinite(p.prior.logpdf(inside)).all()
        assert p.to_unit(inside) == pytest.approx(np.linspace(0.01, 0.99, 9))


@pytest.mark.parametrize("model", ALL, ids=lambda m: m.name)
@pytest.mark.parametrize("bad", [-1e6, 1e6, math.nan, math.inf, "0.3", True, None])
def test_every_bad_value_gets_the_same_shaped_message(model, bad):
    good = {p.name: float(p.from_unit(0.5)) for p in model.params}
    for p in model.params:
        with pytest.raises(
            ParamError,
            match=(
                rf"^{model.name}: {p.name} must be a number in \[{p.low:g}, {p.high:g}\],"
                r" got .+$"
            ),
        ):
            model.check({**good, p.name: bad})


@pytest.mark.parametrize("model", ALL, ids=lambda m: m.name)
def test_unknown_and_missing_parameters(model):
    good = {p.name: float(p.from_unit(0.5)) for p in model.params}
    with pytest.raises(ParamError, match=rf"^{model.name}: unknown parameter 'gamma'"):
        model.check({**good, "gamma": 1.0})
    first = model.params[0].name
    with pytest.raises(ParamError, match=rf"^{model.name}: missing parameter '{first}'$"):
        model.check({k: v for k, v in good.items() if k != first})
    assert model.check(good) == good


def _theta(model, shape, rng):
    return {p.name: p.from_unit(rng.uniform(0.05, 0.95, shape)) for p in model.params}


@pytest.mark.parametrize("model", CHOICE_MODELS.values(), ids=lambda m: m.name)
def test_update_and_choice_rule_shapes(model):
    rng = np.random.default_rng(0)
    k, grid = 3, (4, 5)
    q = rng.normal(size=(k,) + grid)
    theta = _theta(model, grid, rng)
    chosen = np.zeros((k, 1, 1))
    chosen[1] = 1.0
    new, delta = model.learn(theta, q, chosen, 1.0)
    assert new.shape == q.shape and delta.shape == grid
    assert np.array_equal(new[0], q[0]) or model.name == "q_forgetting"
    logits = model.drive(theta, q, chosen)
    assert logits.shape == q.shape


@pytest.mark.parametrize("model", CHOICE_MODELS.values(), ids=lambda m: m.name)
def test_drive_is_linear_in_values_and_previous_choice(model):
    # The contract the online estimator's two-option shortcut relies on: the logit gap
    # between two options is the drive of the value and previous-choice differences.
    rng = np.random.default_rng(4)
    theta = _theta(model, (4, 5), rng)
    q1, q2 = rng.normal(size=(2, 2, 4, 5))
    prev1, prev2 = np.array([[[1.0]], [[0.0]]]), np.array([[[0.0]], [[1.0]]])
    mixed = model.drive(theta, 0.7 * q1 - 1.3 * q2, 0.7 * prev1 - 1.3 * prev2)
    apart = 0.7 * model.drive(theta, q1, prev1) - 1.3 * model.drive(theta, q2, prev2)
    assert mixed == pytest.approx(apart, abs=1e-12)
    gap = model.drive(theta, q1[1] - q1[0], prev1[1] - prev1[0])
    logits = model.drive(theta, q1, prev1)
    assert gap == pytest.approx(logits[1] - logits[0], abs=1e-12)


@pytest.mark.parametrize("model", CHOICE_MODELS.values(), ids=lambda m: m.name)
def test_only_learning_parameters_shape_the_values(model):
    rng = np.random.default_rng(1)
    q = rng.normal(size=(3, 6))
    chosen = np.array([[0.0], [0.0], [1.0]])
    a, b = _theta(model, 6, rng), _theta(model, 6, rng)
    for p in model.params:  # vary the choice-rule parameters only
        if p.learning:
            b[p.name] = a[p.name]
    assert np.array_equal(model.learn(a, q, chosen, 0.5)[0], model.learn(b, q, chosen, 0.5)[0])


@pytest.mark.parametrize("model", CHOICE_MODELS.values(), ids=lambda m: m.name)
def test_omission_skips_update_and_likelihood(model):
    rng = np.random.default_rng(2)
    q = rng.normal(size=(3, 6))
    theta = _theta(model, 6, rng)
    none = np.zeros((3, 1))
    new, _ = model.learn(theta, q, none, 1.0)
    assert np.array_equal(new, q)
    assert np.all(log_choice_probability(model.drive(theta, q, none), none) == 0.0)
    # inserting omissions into a session leaves the likelihood unchanged (the sticky bonus
    # still refers to the previous non-omitted choice)
    rows = [("s", 1, "L", 1.0), ("s", 2, "R", 0.0), ("s", 3, "R", 1.0), ("s", 4, "L", 0.0)]
    gappy = rows[:2] + [("s", 9, None, 0.0), ("s", 10, None, 1.0)] + rows[2:]
    point = {p.name: np.array([[float(p.from_unit(0.4))]]) for p in model.params}

    def ll(r):
        return loglik(model, point, stack_animals([encode_animal("R", r)]), (1,))[0, 0]

    assert ll(gappy) == pytest.approx(ll(rows), abs=1e-12)


def test_unknown_model_name_suggests_the_closest():
    with pytest.raises(ValueError, match=r"unknown model 'q_stiky' \(did you mean 'q_sticky'\?\)"):
        get_choice_model("q_stiky")


def test_the_protocol_language_names_every_model_and_parameter():
    # The protocol reader (lower layer) keeps its own lists; they must match the models.
    from server.models import TWO_STAGE_MODELS
    from server.models.two_stage import HYBRID_PARAMS
    from server.protocol.model import ESTIMATE_PARAMETERS, ESTIMATOR_MODELS, TWO_STAGE_ESTIMATOR_MODELS

    assert set(ESTIMATOR_MODELS) == set(CHOICE_MODELS)
    assert set(TWO_STAGE_ESTIMATOR_MODELS) == set(TWO_STAGE_MODELS)
    declared = {p.name for m in CHOICE_MODELS.values() for p in m.params} | {p.name for p in HYBRID_PARAMS}
    assert set(ESTIMATE_PARAMETERS) == declared
