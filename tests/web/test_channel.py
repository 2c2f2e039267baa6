"""The page's end of the lab channel: clocks that tick between feeds, and controls when the
lab does not answer or has gone."""

from __future__ import annotations

import asyncio
import socket

import httpx
from web_samples import OPERATOR

from server.lab.page_channel import ChannelError, decode, encode
from server.web import create_app
from server.web.page_end import LatestFeed, open_lab_view


def facts(**changes) -> dict:
    """One box's facts as the lab sends them (`tiles.facts_of_run`)."""
    base = {
        "box": "rig-7",
        "animal": "RV-0101",
        "protocol": "two-lever reversal",
        "session_id": 3,
        "finished": False,
        "ended_at": None,
        "paused": False,
        "block": "initial",
        "step": "offer",
        "trial": 12,
        "trials_done": 11,
        "rewards": 8,
        "scored": 10,
        "correct": 7,
        "limit_s": 3600.0,
        "last_input_t": 95.0,
        "link_lost": False,
        "last_rule": None,
        "end_reason": None,
        "cap_reached": False,
        "rule_alarm": None,
    }
    base.update(changes)
    return base


class Clock:
    def __init__(self, t: float):
        self.t = t

    def __call__(self) -> float:
        return self.t


def test_times_tick_on_the_page_clock_between_feeds():
    clock = Clock(5000.0)  # the page's own monotonic clock: its origin means nothing here
    feed = LatestFeed(clock)
    ended = facts(box="rig-8", session_id=4, finished=True, ended_at=1800.0, step=None, end_reason="session time limit")
    feed.take({"t": 100.0, "boxes": [facts(), ended]})  # sent at session time 100 s
    live, done = feed.tiles(quiet_after_s=300.0)
    assert (live["elapsed_s"], live["since_input_s"], live["remaining_s"]) == (100.0, 5.0, 3500.0)
    assert live["accuracy"] == 0.7 and live["state"] == "running"
    clock.t += 2.5  # no new feed: nothing changed in the lab, but time went on
    live, done = feed.tiles(quiet_after_s=300.0)
    assert (live["elapsed_s"], live["since_input_s"], live["remaining_s"]) == (102.5, 7.5, 3497.5)
    assert done["elapsed_s"] == 1800.0 and done["remaining_s"] is None  # an ended tile stops
    clock.t += 300.0  # silence long enough for the alarm, raised by the page on its own
    assert [a["kind"] for a in feed.tiles(quiet_after_s=300.0)[0]["alarms"]] == ["no_response"]
    assert feed.running_sessions() == {3}


def test_channel_lines_round_trip_and_refuse_garbage():
    message = {"feed": {"t": 1.5, "boxes": [facts(box='<b>"rig"</b>\n')]}}
    line = encode(message)
    assert line.endswith(b"\n") and line.count(b"\n") == 1
    assert decode(line) == message
    for bad in (b"{not json\n", b"[1, 2]\n", b"\xff\xfe\n"):
        try:
            decode(bad)
        except ChannelError:
            continue
        raise AssertionError(f"accepted {bad!r}")


async def _post_pause(app) -> httpx.Response:
    transport = httpx.ASGITransport(app=app, client=("10.1.2.3", 5000))
    async with httpx.AsyncClient(transport=transport, base_url="http://vigil.test") as web:
        return await web.post("/api/sessions/3/pause", headers={"X-Vigil-Token": OPERATOR})


def test_a_lab_that_does_not_answer_is_a_503_that_says_so(tmp_path, lab_db):
    async def main():
        lab_side, page_side = socket.socketpair()  # nobody reads the lab's side
        view = await open_lab_view(page_side, answer_timeout_s=0.2)
        reading = asyncio.create_task(view.run())
        app = create_app(lab_db["path"], live=view, operator_token=OPERATOR)
        silent = await _post_pause(app)
        lab_side.close()  # the lab goes away: the page reads EOF
        await asyncio.wait_for(reading, 5)
        gone = await _post_pause(app)
        return silent, gone

    silent, gone = asyncio.run(main())
    assert silent.status_code == 503
    assert silent.json()["detail"].startswith("the lab did not answer within 0.2 s")
    assert "check the session" in silent.json()["detail"]
    assert gone.status_code == 503 and "shutting down" in gone.json()["detail"]
