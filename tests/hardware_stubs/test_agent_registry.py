"""Choosing agents by name: options as data, every bad name or value named clearly."""

from __future__ import annotations

import pytest
from box_trials import TrialLoop, new_box

from hardware_stubs.agents import AGENTS, AgentError, make_agent, validate_agent


@pytest.mark.parametrize("name", sorted(AGENTS))
def test_every_agent_declares_sane_options_and_runs_with_defaults(name):
    cls = AGENTS[name]
    assert cls.name == name and cls.summary
    names = [o.name for o in cls.OPTIONS]
    assert len(names) == len(set(names))
    for option in cls.OPTIONS:
        assert option.summary
        if option.default is not None:
            assert option.problem(name, option.default) is None, option.name
        if option.low is not None and not option.choices:
            assert option.problem(name, option.low - 1.0) is not None
            assert option.problem(name, option.high + 1.0) is not None
    agent = make_agent(name)
    assert set(agent.options) == set(names)
    loop = TrialLoop(new_box(agent), reward=lambda choice, trial: True)
    loop.run(10)
    assert any(n == "head_entry" for _, n, _ in loop.log)


def test_unknown_agent_name_suggests_the_nearest():
    expected = r"^unknown agent 'q_lerner' \(did you mean 'q_learner'\?\); known: "
    with pytest.raises(AgentError, match=expected):
        make_agent("q_lerner")
    assert validate_agent("rat", {})[0].startswith("unknown agent 'rat'; known: random, q_learner")


def test_unknown_option_suggests_the_nearest():
    expected = r"^unknown trait 'alpah' for agent 'q_learner' \(did you mean 'alpha'\?\)$"
    with pytest.raises(AgentError, match=expected):
        make_agent("q_learner", alpah=0.2)
    # The random responder does not learn, so it has no alpha at all.
    assert validate_agent("random", {"alpha": 0.2}) == ["unknown trait 'alpha' for agent 'random'"]


def test_bad_values_are_named_with_range_and_all_reported_at_once():
    errors = validate_agent("q_learner", {"alpha": 1.5, "beta": "hot", "omission": True})
    assert errors == [
        "trait 'alpha' of agent 'q_learner' must be between 0 and 1, got 1.5",
        "trait 'beta' of agent 'q_learner' must be a number, got 'hot'",
        "trait 'omission' of agent 'q_learner' must be a number, got True",
    ]
    with pytest.raises(AgentError) as caught:
        make_agent("q_learner", alpha=1.5, beta="hot")
    assert len(caught.value.errors) == 2 and "; " in str(caught.value)
    assert validate_agent("q_learner", {"alpha": float("nan")})  # not a usable number


def test_tracking_is_a_choice_and_excludes_sign_bias():
    assert validate_agent("pavlovian", {"tracking": "signn"}) == [
        "trait 'tracking' of agent 'pavlovian' must be one of sign, goal, intermediate, "
        "got 'signn' (did you mean 'sign'?)"
    ]
    assert validate_agent("pavlovian", {"tracking": "goal", "sign_bias": 0.3}) == [
        "agent 'pavlovian' takes 'tracking' or 'sign_bias', not both"
    ]
    assert validate_agent("pavlovian", {"sign_bias": -1.2})
    assert make_agent("pavlovian", tracking="goal").sign_bias == -1.0
    assert make_agent("pavlovian", sign_bias=0.4).sign_bias == 0.4
    assert make_agent("pavlovian").sign_bias == 0.0


def test_integers_from_a_config_file_are_accepted_as_numbers():
    agent = make_agent("q_learner", beta=4, alpha=1)
    assert agent.options["beta"] == 4.0 and isinstance(agent.beta, float)
