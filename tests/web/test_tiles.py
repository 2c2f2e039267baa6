"""Tiles and alarms: the rules for each alarm, and tiles read from the store at a given time."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

from web_samples import REVERSAL, TestClient, record_session

from server.engine.records import EventLogged
from server.store.writer import Store
from server.web import create_app
from server.web.board import Board, ReadOnlyStore
from server.web.tiles import ago_text, alarms_for, clock_text, ended_early, rule_text, shown

QUIET = 300.0


def kinds(**kw):
    base = dict(
        running=True,
        paused=False,
        link_lost=False,
        silent_s=10.0,
        cap_reached=False,
        end_reason=None,
        quiet_after_s=QUIET,
    )
    base.update(kw)
    return [a.kind for a in alarms_for(**base)]


def test_each_alarm_has_its_rule():
    assert kinds() == []
    assert kinds(link_lost=True) == ["link_lost"]
    assert kinds(link_lost=True, running=False, end_reason="session time limit") == []
    assert kinds(silent_s=QUIET) == ["no_response"]
    assert kinds(silent_s=QUIET - 1) == []
    assert kinds(silent_s=3600, paused=True) == []  # a paused box is meant to be quiet
    assert kinds(running=False, silent_s=3600, end_reason="session time limit") == []
    assert kinds(running=False, end_reason="reward cap reached") == ["cap_reached"]
    assert kinds(cap_reached=True) == ["cap_reached"]
    assert kinds(running=False, end_reason="stopped by operator (10.0.0.4)") == ["ended_early"]
    assert kinds(running=False, end_reason="error: ValueError: x") == ["ended_early"]
    assert kinds(rule_alarm="accuracy fell") == ["rule_alarm"]
    assert kinds(running=False, end_reason="session time limit", rule_alarm="x") == []
    text = alarms_for(
        running=True,
        paused=False,
        link_lost=False,
        silent_s=620.0,
        cap_reached=False,
        end_reason=None,
        quiet_after_s=QUIET,
    )[0].text
    assert text == "no response for 10 min"


def test_normal_ends_are_not_early():
    for reason in (
        "session time limit",
        "time limit",
        "trial limit reached",
        "protocol complete (reversed: streak of 8)",
    ):
        assert not ended_early(reason), reason
    for reason in (
        "stopped by signal (SIGINT)",
        "stopped: program shutting down",
        "interrupted",
        "time limits are odd",
    ):
        assert ended_early(reason), reason


def test_texts():
    assert clock_text(59.9) == "0:59" and clock_text(3725) == "1:02:05" and clock_text(None) == "–"
    assert ago_text(None) == "none yet" and ago_text(12) == "12 s ago" and ago_text(600) == "10 min ago"
    # in words, never the stored action data
    assert rule_text("flip", [{"reverse": ["west", "east"]}]) == "reversed west/east (rule flip)"
    assert rule_text("flip", [{"reverse": ["west", "east"]}], {"streak": 8.0}) == (
        "reversed west/east because streak 8 (rule flip)"
    )
    assert rule_text("pace", [{"scale_iti": 1.5, "scale_now": 2.25}]) == "scaled the ITI by 1.50 (rule pace)"
    assert rule_text("quiet", []) == "fired (rule quiet)"


def test_a_running_session_in_the_store_raises_its_alarms(tmp_path):
    """A session still open in the store, read an hour after it started: it has been silent
    for longer than the limit, its link was lost, and a rule raised an alarm."""
    db = tmp_path / "open.sqlite"
    started = datetime.now(UTC) - timedelta(hours=1)
    with Store.open(db) as store:
        sid = record_session(
            store,
            box="rack-7",
            animal="RN-0701",
            protocol_path=REVERSAL,
            agent="q_learner",
            seed=1,
            end=False,
            minutes=5,
            started_at=started.isoformat(),
            alpha=0.3,
            beta=5.0,
        )
        store.write(sid, EventLogged(290.0, "link_lost", "serial", detail={"why": "unplugged"}))
        store.write(sid, EventLogged(295.0, "alarm", "rule", detail={"message": "too few presses"}))
    board = Board(store=ReadOnlyStore(db), quiet_after_s=QUIET, wall_clock=lambda: started + timedelta(hours=1))
    tile = board.snapshot().tiles[0]
    assert tile["state"] == "running" and abs(tile["elapsed_s"] - 3600.0) < 1e-3
    assert tile["remaining_s"] is None or tile["remaining_s"] >= 0
    assert {a["kind"] for a in tile["alarms"]} == {"link_lost", "no_response", "rule_alarm"}
    assert tile["since_input_s"] > QUIET and tile["link"] == "lost"
    texts = shown(tile)
    assert texts["link"] == "LOST" and texts["state"] == "running"
    # and the page shows each alarm as words with its own icon, in the strip and on the tile
    with TestClient(create_app(db)) as client:
        page = client.get("/").text
    for kind in ("link_lost", "no_response", "rule_alarm"):
        assert page.count(f'data-kind="{kind}"') == 2, kind
        assert page.count(f'class="ic ic-{kind}"') >= 2, kind
    assert "rule alarm: too few presses" in page


def test_the_board_is_shared_until_it_is_stale(lab_db):
    now = [100.0]
    board = Board(store=ReadOnlyStore(lab_db["path"]), ttl_s=0.25, clock=lambda: now[0])
    first = board.snapshot()
    now[0] += 0.2
    assert board.snapshot() is first
    now[0] += 0.1
    second = board.snapshot()
    assert second is not first and second.version == first.version + 1


def test_the_store_line_of_a_rig_reaches_the_page_and_its_live_updates():
    from server.web.overview import overview_body
    from server.web.page_end import LatestFeed

    latest = LatestFeed(clock=lambda: 0.0)
    latest.take({"t": 12.0, "boxes": [], "store": "store: forwarding 380"})
    snap = Board(live=latest).snapshot()
    assert snap.store == "store: forwarding 380"
    assert '"store":"store: forwarding 380"' in snap.board_json  # what live updates carry
    assert "store: forwarding 380" in str(overview_body(snap, with_controls=False))
    latest.take({"t": 13.0, "boxes": []})  # a lab with a local store only says nothing
    assert Board(live=latest).snapshot().store is None
