"""A database written before two-stage trials existed opens, migrates and reads unchanged.

`data/schema_v3.db` was written by the previous release's code (schema version 3): one
4-minute session of protocols/reversal.yaml by a virtual Q-learner on box 'rack-9', animal
'R-930', 23 trials. Opening it with today's Store adds the two-stage columns; every old row
reads back as before, with no second stage, and new two-stage trials go in beside them.
"""

from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path

import pytest

from server.engine.records import SecondStage, TrialRecord
from server.store import Store, schema_version
from server.store.history import trial_history
from server.store.queries import trial_records
from server.store.schema import latest_version

OLD = Path(__file__).with_name("data") / "schema_v3.db"


@pytest.fixture
def old_db(tmp_path):
    path = tmp_path / "lab.db"
    shutil.copyfile(OLD, path)
    return path


def test_the_old_database_migrates_and_reads_as_it_was(old_db):
    with sqlite3.connect(old_db) as conn:
        assert conn.execute("PRAGMA user_version").fetchone()[0] == 3
        before = conn.execute("SELECT trial, choice, rewarded, iti_s, extra FROM trials ORDER BY trial").fetchall()
    assert len(before) == 23
    store = Store.open(old_db)
    assert schema_version(store.conn) == latest_version() == 5  # 4 two-stage columns, 5 the lab-wide store
    store.close()
    with sqlite3.connect(old_db) as conn:
        after = conn.execute("SELECT trial, choice, rewarded, iti_s, extra FROM trials ORDER BY trial").fetchall()
        blanks = conn.execute("SELECT count(*) FROM trials WHERE state IS NULL AND transition IS NULL").fetchone()[0]
    assert after == before
    assert blanks == 23
    with sqlite3.connect(old_db) as conn:
        records = trial_records(conn, 1)
    assert [r.trial for r in records] == list(range(1, 24))
    assert all(r.second is None for r in records)


def test_two_stage_trials_go_in_beside_the_old_ones(old_db):
    store = Store.open(old_db)
    sid = store.begin_session("rack-9", "R-931", "two-stage port choice", None, None, 7)
    second = SecondStage("north", common=False, choice=None, response="poke_north", latency_s=0.8125)
    record = TrialRecord(
        1, "drifting", 1, "two_stage_trial", 0.0, 4.5, "west", "poke_west", 1.25, True, 1.0, True, False,
        False, 2.0, second=second,
    )  # fmt: skip
    store.write(sid, record)
    store.close()
    with sqlite3.connect(old_db) as conn:
        row = conn.execute(
            "SELECT state, transition, choice2, response2, latency2_s, omitted2 FROM trials WHERE session_id = ?",
            (sid,),
        ).fetchone()
        (back,) = trial_records(conn, sid)
        history = trial_history(conn, animals=["R-931", "R-930"], two_stage=True)
    assert row == ("north", "rare", None, "poke_north", 0.8125, 0)
    assert back == record
    # The animals' histories: the old animal's trials have no second stage, the new one's has.
    assert [(p.animal, p.second) for p in history if p.animal == "R-931"] == [("R-931", second)]
    assert all(p.second is None for p in history if p.animal == "R-930")
