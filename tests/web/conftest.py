"""Fixtures for the status page tests: a database of invented sessions, and apps over it."""

from __future__ import annotations

import pytest
from web_samples import (
    AUTOSHAPING,
    EVIL_ANIMAL,
    EVIL_BOX,
    REVERSAL,
    VIEWER,
    TestClient,
    record_session,
)

from server.store.writer import Store
from server.web import create_app


@pytest.fixture(scope="module")
def lab_db(tmp_path_factory):
    """Boxes of our own: three reversal sessions of one animal on rack-1 on three days, the
    first at training stage 1 and the later two at stage 2 (with the stage log), with
    estimates; two autoshaping animals (a sign- and a goal-tracker); and a box and animal
    named with markup."""
    path = tmp_path_factory.mktemp("web") / "lab.sqlite"
    with Store.open(path) as store:
        days = []
        for day, (seed, stage) in enumerate(((11, 1), (12, 2), (15, 2))):
            days.append(
                record_session(
                    store,
                    box="rack-1",
                    animal="RN-0501",
                    protocol_path=REVERSAL,
                    agent="q_learner",
                    seed=seed,
                    estimates=True,
                    alpha=0.3,
                    beta=5.0,
                    started_at=f"2031-05-{10 + day:02d}T09:00:00.000+02:00",
                    settings={"stage": stage},
                )
            )
            if day == 0:
                store.write_stage("RN-0501", 1, "two-lever reversal", "2031-05-10T08:59:00.000+02:00", "start")
                evidence = {"criterion": {"min_accuracy": 0.6}, "sessions": [{"session": days[0], "trials": 80,
                                                                                 "accuracy": 0.7}]}  # fmt: skip
                at = "2031-05-10T09:20:00.000+02:00"
                store.write_stage("RN-0501", 2, "two-lever reversal", at, "advanced", days[0], evidence)
        pav = record_session(
            store,
            box="rack-2",
            animal="RN-0502",
            protocol_path=AUTOSHAPING,
            agent="pavlovian",
            seed=13,
            tracking="sign",
        )
        goal = record_session(  # the day before, in the same box
            store, box="rack-2", animal="RN-0504", protocol_path=AUTOSHAPING, agent="pavlovian", seed=16,
            tracking="goal", started_at="2031-05-11T14:00:00.000+02:00",
        )  # fmt: skip
        evil = record_session(
            store, box=EVIL_BOX, animal=EVIL_ANIMAL, protocol_path=REVERSAL, agent="random", seed=14, minutes=3
        )
    first, middle, second = days  # "second": rack-1's newest session, as the tests have long called it
    return {"path": path, "first": first, "middle": middle, "second": second, "pav": pav, "goal": goal, "evil": evil}


@pytest.fixture
def read_only(lab_db):
    app = create_app(lab_db["path"], lab_name="Room 3 test rack")
    with TestClient(app) as client:
        yield client


@pytest.fixture
def guarded(lab_db):
    """Read-only, with a viewer token."""
    app = create_app(lab_db["path"], viewer_token=VIEWER)
    with TestClient(app) as client:
        yield client
