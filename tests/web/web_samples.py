"""A stored lab of our own for the status page tests: sessions run in virtual time on
emulated boxes with virtual animals, closed loop (the session's own estimator and rules),
written by the real store; and a live lab's config, with waits for what it shows."""

from __future__ import annotations

import asyncio
import json
import time
import warnings
from pathlib import Path

import numpy as np

from hardware_stubs.agents import make_agent
from hardware_stubs.emulated_box import EmulatedBox
from server.engine.caps import HardCaps
from server.engine.records import SessionEnded
from server.engine.virtual import run_virtual
from server.lab.assembly import build_session
from server.protocol.load import load_protocol
from server.store.writer import Store

with warnings.catch_warnings():  # starlette prefers a newer client; httpx is what we have
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient  # noqa: F401  (re-exported for the tests)

REPO = Path(__file__).resolve().parents[2]
REVERSAL = REPO / "protocols" / "reversal.yaml"
AUTOSHAPING = REPO / "protocols" / "autoshaping.yaml"
STARTED = "2031-05-12T09:00:00.000+02:00"

OPERATOR = "op-7f3c9a1e5b2d4c6e"
VIEWER = "view-2b8e4f6a9c1d3e5f"

# Names that would run script if a page pasted them in raw.
EVIL_BOX = '<script>alert("box")</script>'
EVIL_ANIMAL = '"><img src=x onerror=alert(1)>'


def wiring_settings(protocol) -> dict:
    return {
        "caps": {"max_rewards": 250, "max_minutes": 12},
        "wiring": {
            "inputs": {n: line.kind for n, line in protocol.wiring.inputs.items()},
            "outputs": {n: line.kind for n, line in protocol.wiring.outputs.items()},
        },
    }


def record_session(
    store: Store,
    *,
    box: str,
    animal: str,
    protocol_path: Path,
    agent: str,
    seed: int,
    minutes: float = 12.0,
    estimates: bool = False,
    started_at: str = STARTED,
    end: bool = True,
    subject: dict | None = None,
    **agent_options,
) -> int:
    """Run one session in virtual time, closed loop as the lab runs it (estimator and rules
    when asked for estimates), and store every record; returns the session id. With
    `end=False` the session's end is not stored, as if it were still running; `subject` is
    stored with the session's settings as the lab stores a box's `subject` keys."""
    protocol = load_protocol(protocol_path)
    session = build_session(protocol, seed, HardCaps(max_rewards=250, max_minutes=minutes), estimate=estimates)
    box_ = EmulatedBox(protocol.wiring, make_agent(agent, **agent_options), np.random.default_rng(seed))
    settings = wiring_settings(protocol) | ({"subject": subject} if subject is not None else {})
    sid = store.begin_session(
        box, animal, protocol.name, str(protocol_path), protocol.sha256, seed, started_at, settings
    )

    def on_records(records):
        for record in records:
            if end or not isinstance(record, SessionEnded):
                store.write(sid, record)

    run_virtual(session, box_, on_records)
    store.flush()
    return sid


# ---------------------------------------------------------------- a live lab


def lab_config(tmp_path: Path) -> Path:
    """Two boxes of our own: a lever-training rat (many quick trials) and a reversal rat."""
    path = tmp_path / "lab.yaml"
    path.write_text(
        f"""
lab: Bench rig 5
caps: {{max_rewards: 250, max_minutes: 30}}
boxes:
  - name: {json.dumps(EVIL_BOX)}
    animal: LT-0031
    protocol: {REPO / "protocols" / "lever_training_devaluation.yaml"}
    emulate: {{agent: random, seed: 77}}
  - name: rig-5b
    animal: RV-0032
    protocol: {REPO / "protocols" / "reversal.yaml"}
    emulate: {{agent: q_learner, seed: 78, traits: {{alpha: 0.3, beta: 5.0}}}}
""",
        encoding="utf-8",
    )
    return path


async def until(check, timeout: float = 20.0, every: float = 0.05):
    deadline = time.monotonic() + timeout
    while not check():
        if time.monotonic() > deadline:
            raise AssertionError("timed out waiting for the lab")
        await asyncio.sleep(every)


async def tile_of(web, session_id: int) -> dict:
    """The session's tile from GET /api/boxes (`web`: an httpx.AsyncClient)."""
    return next(t for t in (await web.get("/api/boxes")).json() if t["session_id"] == session_id)


async def until_tile(web, session_id: int, check, timeout: float = 20.0) -> dict:
    """The session's tile once `check(tile)` holds (the feed and the board's cache lag a
    little behind the lab)."""
    deadline = time.monotonic() + timeout
    while True:
        tile = await tile_of(web, session_id)
        if check(tile):
            return tile
        assert time.monotonic() < deadline, f"tile never matched: {tile}"
        await asyncio.sleep(0.05)
