"""The lab supervisor: one asyncio loop drives every box's session and keeps the store fed.

Long-lived lab state (store, links, signal handling, the time limit) lives here; each box's
per-session state lives in its `Session`. Records flow one way: session -> store (and any
other subscriber such as the status page).
"""

from __future__ import annotations

import asyncio
import json
import secrets
import signal
import sys
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Callable

import numpy as np

from server.engine.live import LiveSession
from server.engine.records import Record, SessionEnded, TrialRecord
from server.engine.session import Session
from server.lab_config import BoxConfig, LabConfig
from server.link.inprocess import InProcessLink
from server.store.writer import Store

FLUSH_EVERY_S = 0.25


@dataclass
class BoxRun:
    """What the lab holds for one box during a run (also what a status view reads)."""

    config: BoxConfig
    session: Session
    session_id: int
    link: object
    live: LiveSession | None = None
    last_trial: TrialRecord | None = None
    ended: SessionEnded | None = None
    tasks: list[asyncio.Task] = field(default_factory=list)


def wall_now() -> str:
    return datetime.now(timezone.utc).astimezone().isoformat(timespec="milliseconds")


def make_box(box: BoxConfig, clock: Callable[[], float]):
    """The link for one box: an in-process emulated box for `emulate` entries."""
    from hardware_stubs.agents import make_agent
    from hardware_stubs.emulated_box import EmulatedBox

    if box.emulate is None:
        raise LabError(
            f"box '{box.name}': serial ports are not supported by this build; use 'emulate'"
        )
    agent = make_agent(box.emulate.agent, **box.emulate.options)
    emulated = EmulatedBox(box.protocol.wiring, agent, np.random.default_rng(box.emulate.seed))
    return InProcessLink(emulated, clock)


class LabError(Exception):
    pass


class Lab:
    def __init__(self, config: LabConfig, store: Store, *, say: Callable[[str], None] = print):
        self.config = config
        self.store = store
        self.say = say
        self.runs: list[BoxRun] = []
        self._stop_reason: str | None = None

    def stop_all(self, reason: str) -> None:
        self._stop_reason = self._stop_reason or reason
        for run in self.runs:
            if run.live is not None and not run.session.finished:
                run.live.request_stop(reason)

    # ------------------------------------------------------------ operator controls

    def find(self, box: str) -> BoxRun:
        for run in self.runs:
            if run.config.name == box:
                return run
        raise KeyError(box)

    def control(self, box: str, action: str, origin: str) -> None:
        """Pause, resume or stop one box's session (the status page's controls call this).

        Raises KeyError for an unknown box and ValueError when the session has ended.
        """
        run = self.find(box)
        if run.session.finished or run.live is None:
            raise ValueError(f"session of box '{box}' has ended")
        if action == "stop":
            run.live.request("stop", f"stopped by operator ({origin})")
        else:
            run.live.request(action, origin)

    def _publisher(self, run: BoxRun) -> Callable[[list[Record]], None]:
        def publish(records: list[Record]) -> None:
            for record in records:
                if isinstance(record, TrialRecord):
                    run.last_trial = record
                elif isinstance(record, SessionEnded):
                    run.ended = record
                    self.say(
                        f"{run.config.name}: session {run.session_id} ended ({record.reason}); "
                        f"{record.trials} trials, {record.rewards} rewards"
                    )
                self.store.write(run.session_id, record)

        return publish

    async def run(self, minutes: float | None = None) -> list[BoxRun]:
        loop = asyncio.get_running_loop()
        closed = self.store.close_interrupted(wall_now())
        if closed:
            self.say(f"closed {len(closed)} interrupted session(s) from an earlier run: {closed}")
        t0 = loop.time()

        def clock() -> float:
            return loop.time() - t0

        for box in self.config.boxes:
            seed = box.seed if box.seed is not None else secrets.randbits(63)
            session = Session(box.protocol, seed, self.config.caps)
            link = make_box(box, clock)
            settings = {
                "caps": {"max_rewards": self.config.caps.max_rewards, "max_minutes": self.config.caps.max_minutes},
                "emulate": None if box.emulate is None else {
                    "agent": box.emulate.agent, "seed": box.emulate.seed, "options": box.emulate.options,
                },
                "port": box.port,
            }  # fmt: skip
            session_id = self.store.begin_session(
                box.name, box.animal, box.protocol.name, box.protocol.source,
                box.protocol.sha256, seed, wall_now(), settings,
            )  # fmt: skip
            run = BoxRun(box, session, session_id, link)
            run.live = LiveSession(session, link, clock, self._publisher(run))
            self.runs.append(run)
            self.say(f"{box.name}: animal {box.animal}, protocol '{box.protocol.name}', session {session_id}")

        signals = _install_signals(loop, self.stop_all)
        flusher = asyncio.create_task(self._flush_loop())
        limit = asyncio.create_task(self._time_limit(minutes)) if minutes else None
        link_tasks = [asyncio.create_task(run.link.run()) for run in self.runs]
        try:
            results = await asyncio.gather(*(run.live.run() for run in self.runs), return_exceptions=True)
            for run, result in zip(self.runs, results):
                if isinstance(result, BaseException):
                    self.say(f"{run.config.name}: session {run.session_id} failed: {result!r}")
        finally:
            for task in link_tasks + [flusher] + ([limit] if limit else []):
                task.cancel()
            await asyncio.gather(*link_tasks, flusher, *([limit] if limit else []), return_exceptions=True)
            _remove_signals(loop, signals)
            self.store.flush()
        return self.runs

    async def _flush_loop(self) -> None:
        while True:
            await asyncio.sleep(FLUSH_EVERY_S)
            try:
                self.store.flush_due(time.monotonic())
            except Exception as exc:  # full disk etc.: keep running, data stays buffered
                self.say(f"warning: {exc}")

    async def _time_limit(self, minutes: float) -> None:
        await asyncio.sleep(minutes * 60.0)
        self.say(f"time limit of {minutes:g} min reached; ending sessions")
        self.stop_all("time limit")


def _install_signals(loop: asyncio.AbstractEventLoop, stop_all: Callable[[str], None]) -> list[int]:
    installed = []
    for sig in (signal.SIGINT, signal.SIGTERM):
        try:
            loop.add_signal_handler(sig, stop_all, f"stopped by signal ({sig.name})")
            installed.append(sig)
        except (NotImplementedError, RuntimeError):  # not the main thread
            pass
    return installed


def _remove_signals(loop: asyncio.AbstractEventLoop, installed: list[int]) -> None:
    for sig in installed:
        loop.remove_signal_handler(sig)


def summary_table(runs: list[BoxRun]) -> str:
    rows = [("box", "animal", "session", "trials", "rewards", "end reason")]
    for run in runs:
        end = run.ended
        rows.append((
            run.config.name, run.config.animal, str(run.session_id),
            str(end.trials if end else run.session.trials_done),
            str(end.rewards if end else run.session.rewards),
            end.reason if end else "not ended",
        ))  # fmt: skip
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    return "\n".join("  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows)


def dump_json(obj) -> None:
    sys.stdout.write(json.dumps(obj, sort_keys=True) + "\n")
