"""Records of an invented session, shared by the store tests."""

from __future__ import annotations

import dataclasses

import pytest

from server.engine.records import TrialRecord

# A module whose tests hold for both backends says `pytestmark = BOTH_BACKENDS`
# (the `backend` fixture, tests/store/conftest.py).
BOTH_BACKENDS = pytest.mark.parametrize("backend", ["sqlite", "postgresql"], indirect=True)

# An invented lab: box "shelf-2/left", rat "R-117", a two-lever reversal protocol "flip-flop".
STARTED_AT = "2031-04-07T21:30:00.000+02:00"


def make_trial(n: int, **overrides) -> TrialRecord:
    """Trial n of a left/right choice session: 20 s apart, right chosen every third trial,
    rewarded on odd trials."""
    t0 = 20.0 * (n - 1)
    trial = TrialRecord(
        trial=n,
        block="acquire",
        block_index=1,
        trial_type="free-choice",
        t_start=t0,
        t_end=t0 + 3.25,
        choice="left" if n % 3 else "right",
        response="press_left" if n % 3 else "press_right",
        latency_s=1.0 + n / 7,
        rewarded=bool(n % 2),
        reward=1.0 if n % 2 else 0.0,
        correct=bool(n % 3),
        omission=False,
        interrupted=False,
        iti_s=16.75,
        steps=(("cue", t0), ("choose", t0 + 0.5), ("collect", t0 + 2.0)),
        counts={"press_left": 2, "head_entry": 1},
        first_s={"press_left": 1.0 + n / 7},
        extra={"note": f"trial {n}", "draws": [0.1, 0.2]},
    )
    return dataclasses.replace(trial, **overrides)
