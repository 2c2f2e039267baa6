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
    """Three boxes: a reversal with estimates (two sessions of one animal on rack-1, the
    second newer), an autoshaping session, and a box and animal named with markup."""
    path = tmp_path_factory.mktemp("web") / "lab.sqlite"
    with Store.open(path) as store:
        first = record_session(
            store,
            box="rack-1",
            animal="RN-0501",
            protocol_path=REVERSAL,
            agent="q_learner",
            seed=11,
            estimates=True,
            alpha=0.3,
            beta=5.0,
            started_at="2031-05-11T09:00:00.000+02:00",
        )
        second = record_session(
            store,
            box="rack-1",
            animal="RN-0501",
            protocol_path=REVERSAL,
            agent="q_learner",
            seed=12,
            estimates=True,
            alpha=0.3,
            beta=5.0,
        )
        pav = record_session(
            store,
            box="rack-2",
            animal="RN-0502",
            protocol_path=AUTOSHAPING,
            agent="pavlovian",
            seed=13,
            tracking="sign",
        )
        evil = record_session(
            store, box=EVIL_BOX, animal=EVIL_ANIMAL, protocol_path=REVERSAL, agent="random", seed=14, minutes=3
        )
    return {"path": path, "first": first, "second": second, "pav": pav, "evil": evil}


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
