"""The live driver keeps what the box reports after its session has ended.

A lever pressed after the stop, or the replay of a line dropped just before it, reaches the
driver when the core no longer acts: it must still be logged (the store holds every event the
box reported, bench/soak.py counts them), and it must change nothing."""

from __future__ import annotations

import asyncio
from pathlib import Path

import numpy as np

from hardware_stubs.agents import make_agent
from hardware_stubs.emulated_box import EmulatedBox
from server.engine.caps import HardCaps
from server.engine.live import LiveSession
from server.engine.records import EventLogged, InputEvent, SessionEnded, TrialRecord
from server.lab.assembly import build_session
from server.link.inprocess import InProcessLink
from server.protocol.load import load_protocol

PROTOCOL = Path(__file__).resolve().parents[2] / "protocols" / "reversal.yaml"


def _live(records: list) -> LiveSession:
    protocol = load_protocol(PROTOCOL)
    session = build_session(protocol, 41, HardCaps(), log_events=True)
    loop = asyncio.get_running_loop()
    t0 = loop.time()

    def clock() -> float:
        return loop.time() - t0

    box = EmulatedBox(protocol.wiring, make_agent("q_learner"), np.random.default_rng(42))
    return LiveSession(session, InProcessLink(box, clock), clock, records.extend)


def _inputs(records: list, seq: int) -> list[EventLogged]:
    return [r for r in records if isinstance(r, EventLogged) and r.kind == "input" and r.device_seq == seq]


def test_an_input_after_the_end_is_logged_and_changes_nothing():
    async def body() -> list:
        records: list = []
        live = _live(records)
        running = asyncio.create_task(live.run())
        await asyncio.sleep(0.05)
        live.request_stop("stopped by the test")
        await running
        trials, rewards = live.session.trials_done, live.session.rewards
        live.input(InputEvent("press_west", True, 123_456, 9001), live.clock())
        assert (live.session.trials_done, live.session.rewards) == (trials, rewards)
        return records

    records = asyncio.run(body())
    late = _inputs(records, 9001)
    assert len(late) == 1 and late[0].name == "press_west" and late[0].value == 1.0
    ended = next(i for i, r in enumerate(records) if isinstance(r, SessionEnded))
    assert records.index(late[0]) > ended
    assert not any(isinstance(r, TrialRecord) for r in records[ended:])


def test_an_input_queued_behind_the_stop_is_logged_when_the_driver_ends():
    async def body() -> list:
        records: list = []
        live = _live(records)
        running = asyncio.create_task(live.run())
        await asyncio.sleep(0.05)
        # Both wait in the inbox: the stop is taken first, and the driver leaves its loop
        # with the press still queued.
        live.request_stop("stopped by the test")
        live.inbox.put_nowait((InputEvent("press_east", True, 654_321, 9002), live.clock()))
        await running
        assert live.inbox.empty()
        return records

    assert len(_inputs(asyncio.run(body()), 9002)) == 1
