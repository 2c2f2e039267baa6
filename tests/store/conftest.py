"""Fixtures for store tests: a fresh database per test and records of an invented session.

`db_path` is a SQLite file by default. A module that holds for both backends says so with
`pytestmark = BOTH_BACKENDS`: each of its tests then runs once on a SQLite file and once on
a fresh schema of the session's PostgreSQL server (tests/pg_server.py), one suite for two
backends."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import pytest
from store_samples import STARTED_AT

from server.store import Store


class FakeWallClock:
    """A wall clock the test moves by hand (the store must never read the real one here)."""

    def __init__(self, start: datetime):
        self.now = start

    def __call__(self) -> datetime:
        return self.now

    def advance(self, seconds: float) -> None:
        self.now += timedelta(seconds=seconds)


@pytest.fixture
def wall_clock() -> FakeWallClock:
    return FakeWallClock(datetime(2031, 4, 7, 21, 30, tzinfo=timezone(timedelta(hours=2))))


@pytest.fixture
def backend(request) -> str:
    return getattr(request, "param", "sqlite")


@pytest.fixture
def db_path(request, backend, tmp_path):
    if backend == "postgresql":
        return request.getfixturevalue("pg_cluster").fresh_schema()
    return tmp_path / "lab.sqlite"


@pytest.fixture
def store(db_path, wall_clock):
    opened = Store.open(db_path, wall_clock=wall_clock)
    yield opened
    try:
        opened.close()
    except Exception:  # a test may leave it failing on purpose; the file is discarded anyway
        opened.conn.close()


@pytest.fixture
def begin(store):
    """Begin a session of the invented lab; keyword arguments override the defaults."""

    def begin_session(**overrides) -> int:
        args = dict(
            box="shelf-2/left",
            animal="R-117",
            protocol="flip-flop",
            protocol_path="protocols/flip-flop.yaml",
            protocol_sha256="ab" * 32,
            seed=20310407,
            started_at=STARTED_AT,
            settings={"caps": {"max_rewards": 120, "max_minutes": 60}, "agent": None},
        )
        args.update(overrides)
        return store.begin_session(**args)

    return begin_session
