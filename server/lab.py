"""The lab supervisor: one asyncio loop drives every box's session and keeps the store fed.

Long-lived lab state (store, links, signal handling, the time limit) lives here; each box's
per-session state lives in its `Session`. Records flow one way: session -> store (and any
other subscriber such as the status page).
"""

from __future__ import annotations

import asyncio
import json
import re
import secrets
import shutil
import signal
import sys
import tempfile
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from server.closed_loop import animal_estimator_state, build_session
from server.engine.live import LiveSession
from server.engine.records import EventLogged, Record, SessionEnded, TrialRecord
from server.engine.session import Session
from server.lab_config import BoxConfig, LabConfig
from server.link.emulator_process import EmulatorProcess, emulator_command
from server.link.handshake import LinkError
from server.link.inprocess import InProcessLink
from server.link.serial_link import SerialLink
from server.stages import advancement, current_stage, stage_for_box
from server.store.background import BackgroundWriter
from server.store.writer import Store


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
    # What the status page shows, kept up to date by `observe` from the record stream.
    last_input_t: float | None = None  # session time of the last input onset
    last_rule: Record | None = None  # the last rule firing (a record with .rule, .t, .actions)
    last_alarm: EventLogged | None = None  # the last alarm a rule raised
    link_lost: bool = False
    cap_reached: bool = False
    scored: int = 0  # trials where correctness applies
    correct: int = 0
    records_seen: int = 0  # lets a status view skip a box whose session said nothing new

    def observe(self, record: Record) -> None:
        """Remember what a status view needs from one record (constant time per record)."""
        self.records_seen += 1
        if isinstance(record, TrialRecord):
            self.last_trial = record
            if record.correct is not None:
                self.scored += 1
                self.correct += bool(record.correct)
        elif isinstance(record, EventLogged):
            kind = record.kind
            if kind == "input":
                if record.value:
                    self.last_input_t = record.t
            elif kind == "alarm":
                self.last_alarm = record
            elif kind in ("link_lost", "link_restored"):
                self.link_lost = kind == "link_lost"
            elif kind == "cap":
                self.cap_reached = True
        elif isinstance(record, SessionEnded):
            self.ended = record
        elif hasattr(record, "rule"):  # a rule firing
            self.last_rule = record


def wall_now() -> str:
    return datetime.now(UTC).astimezone().isoformat(timespec="milliseconds")


EMULATOR_STARTUP_S = 30.0  # a child process importing numpy on a busy machine


def make_box(
    box: BoxConfig,
    clock: Callable[[], float],
    *,
    folder: Path | None = None,
    say: Callable[[str], None] = print,
    in_process: bool = False,
):
    """The link for one box: a serial link to its `port`, or for an `emulate` entry a serial
    link to an emulated box started as a child process on a pty in `folder` (the same path
    as a real box); `in_process` keeps emulated boxes inside this process instead (tests)."""
    from hardware_stubs.agents import make_agent
    from hardware_stubs.emulated_box import EmulatedBox

    if box.port is not None:
        return SerialLink(box.name, box.port, box.protocol.wiring, clock, say=say)
    assert box.emulate is not None
    if not in_process:
        if folder is None:
            raise LabError(f"box '{box.name}': no folder for the emulated box's pty")
        path = folder / (re.sub(r"[^A-Za-z0-9._-]", "_", box.name) + ".tty")  # names are unique
        emu = box.emulate
        command = emulator_command(path, box.protocol.source, emu.agent, emu.seed, emu.options, emu.faults)
        child = EmulatorProcess(box.name, path, command)
        return SerialLink(box.name, str(path), box.protocol.wiring, clock, say=say,
                          on_close=child.stop, gone=child.failure,
                          startup_s=EMULATOR_STARTUP_S)  # fmt: skip
    agent = make_agent(box.emulate.agent, **box.emulate.options)
    emulated = EmulatedBox(box.protocol.wiring, agent, np.random.default_rng(box.emulate.seed))
    return InProcessLink(emulated, clock)


class LabError(Exception):
    pass


class Lab:
    def __init__(
        self,
        config: LabConfig,
        store: Store,
        *,
        say: Callable[[str], None] = print,
        in_process_boxes: bool = False,
    ):
        self.config = config
        self.store = store
        self.writer = BackgroundWriter(store, say)  # commits off the event loop
        self.say = say
        self.in_process_boxes = in_process_boxes  # emulated boxes without serial (tests)
        self.runs: list[BoxRun] = []
        self._stages: dict[str, int] = {}  # box name -> 1-based stage running today
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

    def annotate(self, box: str, text: str, origin: str) -> int:
        """Store a free-text note on the box's current session at the session time now.

        Raises KeyError for an unknown box; returns the annotation's id.
        """
        run = self.find(box)
        t = run.ended.t if run.ended is not None else (run.live.clock() if run.live else None)
        with self.writer.direct() as store:
            return store.write_annotation(run.session_id, text, origin, t=t, wall_time=wall_now())

    def _publisher(self, run: BoxRun) -> Callable[[list[Record]], None]:
        def publish(records: list[Record]) -> None:
            for record in records:
                run.observe(record)
                if isinstance(record, SessionEnded):
                    self.say(
                        f"{run.config.name}: session {run.session_id} ended ({record.reason}); "
                        f"{record.trials} trials, {record.rewards} rewards"
                    )
                self.writer.write(run.session_id, record)
                if isinstance(record, SessionEnded):
                    self._after_session(run)

        return publish

    # ------------------------------------------------------------ training stages

    def _today(self, box: BoxConfig) -> BoxConfig:
        """The box with the protocol its animal runs today: its current training stage, with
        the animal's own settings applied."""
        protocol = box.protocol
        if box.stages:
            stage = stage_for_box(self.store.conn, box)
            protocol = box.stages[stage - 1].protocol
            if current_stage(self.store.conn, box.animal) is None:
                self.store.write_stage(box.animal, stage, protocol.name, wall_now(), "start")
            self._stages[box.name] = stage
            self.say(f"{box.name}: animal {box.animal} at stage {stage} of {len(box.stages)}")
        if box.settings:
            mine = {k: v for k, v in box.settings.items() if k in protocol.settings}
            protocol = replace(protocol, settings={**protocol.settings, **mine})
        return replace(box, protocol=protocol)

    def _after_session(self, run: BoxRun) -> None:
        box = run.config
        stage = self._stages.get(box.name)
        if stage is None or stage >= len(box.stages):
            return
        advance = box.stages[stage - 1].advance
        if advance is None:
            return
        self.writer.drain()  # the session's last trials are with the store before judging
        with self.writer.direct() as store:
            store.flush()
            evidence = advancement(store.conn, box.animal, stage, advance)
            if evidence is None:
                return
            nxt = box.stages[stage].protocol
            store.write_stage(box.animal, stage + 1, nxt.name, wall_now(), "advanced", run.session_id, evidence)
        self.say(f"{box.name}: animal {box.animal} advances to stage {stage + 1} ('{nxt.name}') next session")

    async def run(self, minutes: float | None = None) -> list[BoxRun]:
        loop = asyncio.get_running_loop()
        closed = self.store.close_interrupted(wall_now())
        if closed:
            self.say(f"closed {len(closed)} interrupted session(s) from an earlier run: {closed}")
        self.config = replace(self.config, boxes=tuple(self._today(box) for box in self.config.boxes))
        t0 = loop.time()

        def clock() -> float:
            return loop.time() - t0

        # A folder for the emulated boxes' pty links, only when some box needs one.
        emulated = not self.in_process_boxes and any(b.emulate is not None for b in self.config.boxes)
        folder = Path(tempfile.mkdtemp(prefix="vigil-boxes-")) if emulated else None
        try:
            links = await self._connect(clock, folder)
        except BaseException:
            if folder is not None:
                shutil.rmtree(folder, ignore_errors=True)
            raise
        t0 = loop.time()  # session time starts once every box has answered
        for box, link in zip(self.config.boxes, links):
            seed = box.seed if box.seed is not None else secrets.randbits(63)
            state = animal_estimator_state(self.store.conn, box.animal, box.protocol)
            session = build_session(box.protocol, seed, self.config.caps, estimator_state=state)
            settings = {
                "caps": {"max_rewards": self.config.caps.max_rewards, "max_minutes": self.config.caps.max_minutes},
                "emulate": None if box.emulate is None else {
                    "agent": box.emulate.agent, "seed": box.emulate.seed, "options": box.emulate.options,
                    "faults": box.emulate.faults,
                },
                "port": box.port,
                "stage": self._stages.get(box.name),
                "protocol_settings": box.protocol.settings,
                # Line kinds let a reader of the store tell a feeder pulse from a sync pulse.
                "wiring": {
                    "inputs": {n: line.kind for n, line in box.protocol.wiring.inputs.items()},
                    "outputs": {n: line.kind for n, line in box.protocol.wiring.outputs.items()},
                },
            }  # fmt: skip
            session_id = self.store.begin_session(
                box.name, box.animal, box.protocol.name, box.protocol.source,
                box.protocol.sha256, seed, wall_now(), settings,
            )  # fmt: skip
            run = BoxRun(box, session, session_id, link)
            run.live = LiveSession(session, link, clock, self._publisher(run))
            if isinstance(link, SerialLink):
                link.bind(session, self._publisher(run))
            self.runs.append(run)
            self.say(f"{box.name}: animal {box.animal}, protocol '{box.protocol.name}', session {session_id}")

        signals = _install_signals(loop, self.stop_all)
        self.writer.start()
        limit = asyncio.create_task(self._time_limit(minutes)) if minutes else None
        link_tasks = [asyncio.create_task(run.link.run()) for run in self.runs]
        try:
            results = await asyncio.gather(*(run.live.run() for run in self.runs), return_exceptions=True)
            for run, result in zip(self.runs, results):
                if isinstance(result, BaseException):
                    self.say(f"{run.config.name}: session {run.session_id} failed: {result!r}")
        finally:
            # Sessions end with outputs off: wait for the box to acknowledge, then close.
            await _close_links([run.link for run in self.runs])
            if folder is not None:
                shutil.rmtree(folder, ignore_errors=True)
            for task in link_tasks + ([limit] if limit else []):
                task.cancel()
            await asyncio.gather(*link_tasks, *([limit] if limit else []), return_exceptions=True)
            _remove_signals(loop, signals)
            self.writer.close()  # everything queued is committed before the lab returns
        return self.runs

    async def _connect(self, clock: Callable[[], float], folder: Path | None) -> list:
        """A link per box, each greeted and checked against its protocol's wiring before
        any session starts; every box's problem is reported at once."""
        links = [
            make_box(box, clock, folder=folder, say=self.say, in_process=self.in_process_boxes)
            for box in self.config.boxes
        ]
        serial_links = [link for link in links if isinstance(link, SerialLink)]
        results = await asyncio.gather(*(link.connect() for link in serial_links), return_exceptions=True)
        failures = [r for r in results if isinstance(r, BaseException)]
        if failures:
            await _close_links(links)
            bugs = [r for r in failures if not isinstance(r, LinkError)]
            if bugs:
                raise bugs[0]
            raise LabError("\n".join(str(r) for r in failures))
        return links

    async def _time_limit(self, minutes: float) -> None:
        await asyncio.sleep(minutes * 60.0)
        self.say(f"time limit of {minutes:g} min reached; ending sessions")
        self.stop_all("time limit")


async def _close_links(links: list) -> None:
    closing = [link.close() for link in links if isinstance(link, SerialLink)]
    await asyncio.gather(*closing, return_exceptions=True)


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
    """The end-of-run summary: one row per box, with the rules that fired and how often."""
    from server.rules.book import firing_counts as rule_firings

    rows = [("box", "animal", "session", "trials", "rewards", "end reason", "rule firings")]
    for run in runs:
        end = run.ended
        fired = ", ".join(f"{name} x{n}" for name, n in rule_firings(run.session).items() if n) or "-"
        rows.append((
            run.config.name, run.config.animal, str(run.session_id),
            str(end.trials if end else run.session.trials_done),
            str(end.rewards if end else run.session.rewards),
            end.reason if end else "not ended", fired,
        ))  # fmt: skip
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    return "\n".join("  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows)


def dump_json(obj) -> None:
    sys.stdout.write(json.dumps(obj, sort_keys=True) + "\n")
