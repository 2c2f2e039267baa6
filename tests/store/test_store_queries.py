"""Read-only views and CSV exports, as the status page and the CLI will use them."""

from __future__ import annotations

import csv
import io
import json

import pytest
from store_samples import BOTH_BACKENDS, make_trial

from server.engine.records import EventLogged, SessionEnded
from server.store import csv_exports, queries

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


def test_trials_csv_spreads_json_columns_and_rounds_times(lab):
    out = io.StringIO()
    assert csv_exports.export_trials_csv(lab["conn"], lab["second"], out) == 6
    parsed = list(csv.DictReader(io.StringIO(out.getvalue())))
    assert [int(r["trial"]) for r in parsed] == [1, 2, 3, 4, 5, 6]
    # No JSON in a cell, but for a list inside the protocol's own `extra` values.
    assert not any(v.startswith(("{", "[")) for r in parsed for k, v in r.items() if k != "extra.draws")
    for row, trial in zip(parsed, (make_trial(n, correct=n > 1, omission=n == 6) for n in range(1, 7))):
        assert row["session_id"] == str(lab["second"])
        assert row["t_end"] == f"{trial.t_end:.3f}"
        assert row["latency_s"] == f"{round(trial.latency_s, 3):.3f}"  # 1 + n/7 has many digits
        assert row["choice"] == trial.choice
        assert int(row["correct"]) == trial.correct
        # per-input counts as columns; steps as their entry times; extra's keys as columns
        assert {k: int(row[f"counts.{k}"]) for k in trial.counts} == trial.counts
        assert (row["responses.press_left"], row["responses.head_entry"]) == ("2", "1")
        assert row["first_s.press_left"] == f"{trial.first_s['press_left']:.3f}"
        assert [float(row[f"steps.{name}"]) for name, _ in trial.steps] == [round(t, 3) for _, t in trial.steps]
        assert row["extra.note"] == trial.extra["note"]
        assert json.loads(row["extra.draws"]) == trial.extra["draws"]


def test_trials_csv_of_a_session_without_trials_has_a_header(lab):
    out = io.StringIO()
    assert csv_exports.export_trials_csv(lab["conn"], lab["other_rat"], out) == 0
    assert out.getvalue().startswith("session_id,trial,block,")


def test_events_csv_keeps_empty_fields_empty(lab):
    out = io.StringIO()
    assert csv_exports.export_events_csv(lab["conn"], lab["mouse"], out) == 30
    lines = out.getvalue().splitlines()
    assert lines[0] == "id,session_id,kind,name,value,t,device_t_us,device_seq,detail"
    first = next(csv.DictReader(io.StringIO(out.getvalue())))
    assert (first["kind"], first["value"], first["device_seq"], first["detail"]) == ("input", "1.0", "", "")


def test_choices_csv_uses_the_fitting_format(lab):
    # Header from DESIGN.md: animal,session,trial,choice,reward; empty choice = omission.
    out = io.StringIO()
    assert csv_exports.export_choices_csv(lab["conn"], out, animal="R-117") == 9
    rows = list(csv.reader(io.StringIO(out.getvalue())))
    assert rows[0] == ["animal", "session", "trial", "choice", "reward"]
    assert rows[1] == ["R-117", str(lab["first"]), "1", "left", "1.0"]
    assert rows[3] == ["R-117", str(lab["first"]), "3", "right", "1.0"]
    # trial 6 of the second night is an omission: no choice, whatever the record's label
    assert rows[-1] == ["R-117", str(lab["second"]), "6", "", "0.0"]
    one = io.StringIO()
    assert csv_exports.export_choices_csv(lab["conn"], one, session_id=lab["second"]) == 6
    assert one.getvalue().splitlines()[1:] == out.getvalue().splitlines()[4:]


def test_readers_cannot_write(lab):
    # SQLite: "attempt to write a readonly database"; PostgreSQL: "... in a read-only transaction"
    with pytest.raises(Exception, match="read-?only"):
        lab["conn"].execute("DELETE FROM sessions")
