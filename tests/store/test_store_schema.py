"""Schema versioning, migrations and the pragmas every writer relies on."""

from __future__ import annotations

import dataclasses
import sqlite3

import pytest

from server.engine.records import BlockStarted, EventLogged, SecondStage, TrialRecord
from server.store import MIGRATIONS, Store, StoreError, migrate, schema_version
from server.store.schema import Migration, latest_version, statements


def columns(conn: sqlite3.Connection, table: str) -> list[str]:
    return [row[1] for row in conn.execute(f"PRAGMA table_info({table})")]


def test_new_database_is_at_latest_version_with_every_table(store):
    assert schema_version(store.conn) == latest_version() == len(MIGRATIONS)
    tables = {row[0] for row in store.conn.execute("SELECT name FROM sqlite_schema WHERE type = 'table'")}
    assert {"sessions", "trials", "events", "blocks", "estimates", "annotations"} <= tables


def test_tables_hold_every_field_of_the_records(store):
    # The records are the contract with the engine: a field without a column would be lost.
    trial_fields = [f.name for f in dataclasses.fields(TrialRecord) if f.name != "second"]
    # A two-stage trial's second stage is stored flat, one column per field.
    second_columns = {
        "state": "state",
        "common": "transition",
        "choice": "choice2",
        "response": "response2",
        "latency_s": "latency2_s",
        "omitted": "omitted2",
    }
    assert set(second_columns) == {f.name for f in dataclasses.fields(SecondStage)}
    assert columns(store.conn, "trials") == ["session_id", *trial_fields, *second_columns.values()]
    event_fields = {f.name for f in dataclasses.fields(EventLogged)}
    assert event_fields <= set(columns(store.conn, "events"))
    block_fields = {f.name for f in dataclasses.fields(BlockStarted)} - {"t"}
    assert block_fields <= set(columns(store.conn, "blocks"))
    assert columns(store.conn, "sessions") == [
        "id",
        "box",
        "animal",
        "protocol",
        "protocol_path",
        "protocol_sha256",
        "started_at",
        "ended_at",
        "end_reason",
        "seed",
        "trials",
        "rewards",
        "settings",
        "rig",
    ]


def test_writer_runs_wal_with_full_sync_and_foreign_keys(store, db_path):
    assert store.conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert store.conn.execute("PRAGMA synchronous").fetchone()[0] == 2  # 2 = FULL
    assert store.conn.execute("PRAGMA foreign_keys").fetchone()[0] == 1
    # WAL is a property of the file: another connection sees it too.
    other = sqlite3.connect(db_path)
    assert other.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    other.close()


def test_reopening_keeps_data_and_version(db_path, begin, store):
    session_id = begin()
    store.close()
    again = Store.open(db_path)
    assert schema_version(again.conn) == latest_version()
    assert again.conn.execute("SELECT animal FROM sessions WHERE id = ?", (session_id,)).fetchone() == ("R-117",)
    again.close()


def test_newer_schema_is_refused_with_a_clear_message(db_path):
    Store.open(db_path).close()
    conn = sqlite3.connect(db_path)
    conn.execute("PRAGMA user_version = 99")
    conn.close()
    with pytest.raises(
        StoreError,
        match=r"^cannot use database .*schema version 99 is newer "
        rf"than this vigil knows \({len(MIGRATIONS)}\); upgrade vigil$",
    ):
        Store.open(db_path)


def test_a_database_of_another_program_is_refused(db_path):
    conn = sqlite3.connect(db_path)
    conn.execute("CREATE TABLE inventory (item TEXT)")
    conn.commit()
    conn.close()
    with pytest.raises(StoreError, match="not a vigil database"):
        Store.open(db_path)


def _autocommit(path) -> sqlite3.Connection:
    return sqlite3.connect(path, isolation_level=None)


def test_appended_migration_upgrades_an_existing_database(db_path, begin, store):
    begin()
    store.close()
    nxt = len(MIGRATIONS) + 1
    add_stage = Migration(nxt, "training stage per session", statements("ALTER TABLE sessions ADD COLUMN stage_x TEXT"))
    conn = _autocommit(db_path)
    assert migrate(conn, (*MIGRATIONS, add_stage)) == nxt
    assert "stage_x" in columns(conn, "sessions")
    assert conn.execute("SELECT count(*) FROM sessions").fetchone() == (1,)
    conn.close()


def test_failing_migration_leaves_the_previous_version_intact(db_path):
    Store.open(db_path).close()
    broken = Migration(
        len(MIGRATIONS) + 1,
        "half done",
        statements("CREATE TABLE half_done (animal TEXT)", "ALTER TABLE no_such_table ADD COLUMN x"),
    )
    conn = _autocommit(db_path)
    with pytest.raises(sqlite3.OperationalError):
        migrate(conn, (*MIGRATIONS, broken))
    assert schema_version(conn) == len(MIGRATIONS)
    assert "half_done" not in {r[0] for r in conn.execute("SELECT name FROM sqlite_schema")}
    conn.close()


def test_migrations_must_be_numbered_in_order(db_path):
    conn = _autocommit(db_path)
    gap = len(MIGRATIONS) + 2
    skipped = Migration(gap, "gap", statements("SELECT 1"))
    with pytest.raises(ValueError, match=f"migration {gap} is out of order"):
        migrate(conn, (*MIGRATIONS, skipped))
    conn.close()
