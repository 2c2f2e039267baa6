"""Fixtures shared by every layer's tests: a throwaway PostgreSQL server for the session."""

from __future__ import annotations

import os

import pytest
from pg_server import ClusterUnavailable, start_cluster


@pytest.fixture(scope="session")
def pg_cluster():
    """One PostgreSQL cluster for the whole run (tests/pg_server.py); skipped with the reason
    when PostgreSQL cannot be started here, but never in CI, which installs it."""
    try:
        cluster = start_cluster()
    except ClusterUnavailable as exc:
        if os.environ.get("CI"):
            pytest.fail(f"PostgreSQL is required in CI: {exc}")
        pytest.skip(f"PostgreSQL not available: {exc}")
    yield cluster
    cluster.remove()
