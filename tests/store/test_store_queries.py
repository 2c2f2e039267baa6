"""Read-only views and CSV exports, as the status page and the CLI will use them."""

from __future__ import annotations

import csv
import io
import json

import pytest
from store_samples import BOTH_BACKENDS, make_trial

from server.engine.records import EventLogged, SessionEnded
from server.store import queries

pytestmark = BOTH_BACKENDS


@pytest.fixture
def lab(store, begin, db_path):
    """Two rats over two nights and a mouse still running; returns their session ids."""
    first = begin(started_at="2031-04-07T21:30:00+02:00")
    for n in (1, 2, 3):
        store.write(first, make_trial(n))
    store.write(first, SessionEnded(t=70.0, reason="completed", trials=3, rewards=2))
    second = begin(started_at="2031-04-08T21:30:00+02:00")
    for n in (1, 2, 3, 4, 5, 6):
        store.write(second, make_trial(n, correct=n > 1, omission=n == 6))
    store.write(second, SessionEnded(t=130.0, reason="completed", trials=6, rewards=3))
    other_rat = begin(box="shelf-2/right", animal="R-118", started_at="2031-04-08T21:31:00+02:00")
    store.write(other_rat, SessionEnded(t=1.0, reason="stopped by operator", trials=0, rewards=0))
    mouse = begin(box="shelf-1/left", animal="M-07", started_at="2031-04-08T22:00:00+02:00")
    for k in range(1, 31):
        store.write(
            mouse,
            EventLogged(
                t=k / 2, kind="input" if k % 3 else "output", name="lick" if k % 3 else "cue_light", value=float(k)
            ),
        )
    store.flush()
    conn = queries.open_readonly(db_path)
    yield {"first": first, "second": second, "other_rat": other_rat, "mouse": mouse, "conn": conn}
    conn.close()


def ids(found):
    return [s["id"] for s in found]


def test_list_sessions_filters(lab):
    conn = lab["conn"]
    assert ids(queries.list_sessions(conn)) == [
        lab["mouse"],
        lab["other_rat"],
        lab["second"],
        lab["first"],
    ]  # newest first
    assert ids(queries.list_sessions(conn, animal="R-117")) == [lab["second"], lab["first"]]
    assert ids(queries.list_sessions(conn, box="shelf-2/right")) == [lab["other_rat"]]
    assert ids(queries.list_sessions(conn, running=True)) == [lab["mouse"]]
    assert ids(queries.list_sessions(conn, limit=2)) == [lab["mouse"], lab["other_rat"]]
    assert queries.get_session(conn, 12345) is None


def test_animal_history_summarises_each_session(lab):
    history = queries.animal_history(lab["conn"], "R-117")
    assert [h["id"] for h in history] == [lab["first"], lab["second"]]  # oldest first
    # make_trial: correct on trials not divisible by 3 -> 1, 2 of 3 correct
    assert history[0]["accuracy"] == pytest.approx(2 / 3)
    # second night: correct = n > 1 -> 5 of 6
    assert history[1]["accuracy"] == pytest.approx(5 / 6)
    assert (history[0]["omissions"], history[1]["omissions"]) == (0, 1)
    assert history[1]["trials"] == 6


def test_event_tail_and_since(lab):
    conn, mouse = lab["conn"], lab["mouse"]
    every = queries.session_events(conn, mouse)
    assert [e["value"] for e in every] == [float(k) for k in range(1, 31)]
    tail = queries.session_events(conn, mouse, tail=4)
    assert [e["value"] for e in tail] == [27.0, 28.0, 29.0, 30.0]
    since = queries.session_events(conn, mouse, since_id=every[24]["id"])
    assert since == every[25:]
    outputs = queries.session_events(conn, mouse, kind="output", tail=2)
    assert [e["value"] for e in outputs] == [27.0, 30.0]


def test_trials_after_a_given_trial(lab):
    later = queries.session_trials(lab["conn"], lab["second"], after_trial=4)
    assert [t["trial"] for t in later] == [5, 6]
    assert later[1]["omission"] is True and later[1]["rewarded"] is False


def test_trials_csv_reads_back_to_the_stored_trials(lab):
    out = io.StringIO()
    assert queries.export_trials_csv(lab["conn"], lab["second"], out) == 6
    parsed = list(csv.DictReader(io.StringIO(out.getvalue())))
    assert [int(r["trial"]) for r in parsed] == [1, 2, 3, 4, 5, 6]
    for row, trial in zip(parsed, (make_trial(n, correct=n > 1, omission=n == 6) for n in range(1, 7))):
        assert float(row["t_end"]) == trial.t_end
        assert float(row["latency_s"]) == trial.latency_s
        assert row["choice"] == trial.choice
        assert int(row["correct"]) == trial.correct
        assert json.loads(row["steps"]) == [list(s) for s in trial.steps]
        assert json.loads(row["extra"]) == trial.extra


def test_events_csv_keeps_empty_fields_empty(lab):
    out = io.StringIO()
    assert queries.export_events_csv(lab["conn"], lab["mouse"], out) == 30
    lines = out.getvalue().splitlines()
    assert lines[0] == "id,session_id,kind,name,value,t,device_t_us,device_seq,detail"
    first = next(csv.DictReader(io.StringIO(out.getvalue())))
    assert (first["kind"], first["value"], first["device_seq"], first["detail"]) == ("input", "1.0", "", "")


def test_choices_csv_uses_the_fitting_format(lab):
    # Header from DESIGN.md: animal,session,trial,choice,reward; empty choice = omission.
    out = io.StringIO()
    assert queries.export_choices_csv(lab["conn"], out, animal="R-117") == 9
    rows = list(csv.reader(io.StringIO(out.getvalue())))
    assert rows[0] == ["animal", "session", "trial", "choice", "reward"]
    assert rows[1] == ["R-117", str(lab["first"]), "1", "left", "1.0"]
    assert rows[3] == ["R-117", str(lab["first"]), "3", "right", "1.0"]


def test_readers_cannot_write(lab):
    # SQLite: "attempt to write a readonly database"; PostgreSQL: "... in a read-only transaction"
    with pytest.raises(Exception, match="read-?only"):
        lab["conn"].execute("DELETE FROM sessions")
