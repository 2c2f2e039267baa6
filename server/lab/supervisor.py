"""The lab supervisor: one asyncio loop drives every box's session and keeps the store fed.

Long-lived lab state (store, links, signal handling, the time limit) lives here; each box's
per-session state lives in its `Session`, and what a status view reads of it in its
`BoxStatus`. Records flow one way: session -> store (and the status of the box).
"""

from __future__ import annotations

import asyncio
import secrets
import shutil
import tempfile
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from server.engine.live import LiveSession
from server.engine.records import ControlAction, Record, SessionEnded
from server.engine.seams import BoxLink
from server.engine.session import Session
from server.lab.alarm_desk import AlarmDesk, AlarmSetupError
from server.lab.alarm_send import Outgoing
from server.lab.assembly import animal_estimator_state, build_session, make_estimator
from server.lab.box_links import LabError, close_links, make_box
from server.lab.config import BoxConfig, LabConfig
from server.lab.signals import on_stop_signals
from server.lab.stages import StageKeeper
from server.lab.status import BoxFacts, BoxStatus, box_facts
from server.link.handshake import LinkError
from server.store.background import BackgroundWriter
from server.store.forwarder import Forwarder, StoreLink
from server.store.wall_clock import wall_now
from server.store.writer import Store

# Why a session ended when `vigil run --minutes` ran out (the session's own limit, from its
# protocol and the lab's caps, ends it as "session time limit" in the session core).
RUN_TIME_LIMIT = "run time limit (--minutes)"

__all__ = ["BoxRun", "Lab", "LabError"]

ALARM_EVERY_S = 1.0  # how often the lab looks for alarm conditions
DISK_EVERY_S = 15.0  # how often it reads the free space on the database's disk


@dataclass
class BoxRun:
    """What the lab holds for one box during a run."""

    config: BoxConfig
    session: Session
    session_id: int
    link: BoxLink
    live: LiveSession
    status: BoxStatus = field(default_factory=BoxStatus)
    run_limit_s: float | None = None  # the run's --minutes, in session seconds

    @property
    def ended(self) -> SessionEnded | None:
        return self.status.ended

    @property
    def records_seen(self) -> int:
        return self.status.records_seen

    @property
    def name(self) -> str:
        return self.config.name

    def facts(self) -> BoxFacts:
        """The box's tile facts for the status page (read on the lab's loop)."""
        return box_facts(
            self.config.name, self.config.animal, self.session_id, self.session, self.status, self.link.connected,
            self.run_limit_s,
        )  # fmt: skip


class Lab:
    def __init__(
        self,
        config: LabConfig,
        store: Store,
        *,
        say: Callable[[str], None] = print,
        in_process_boxes: bool = False,
        alarm_senders: Mapping[int, Callable[[Outgoing], None]] | None = None,
        store_problem: Callable[[], str | None] | None = None,
        forwarder: Forwarder | None = None,
    ):
        """`store_problem` says why the store cannot take records now (None when it can); by
        default the last failed commit. `alarm_senders` replaces channels' send functions."""
        self.config = config
        self.store = store  # with a lab-wide store: the rig's spool
        self.forwarder = forwarder  # carries the spool to the lab-wide store; polls its controls
        self.writer = BackgroundWriter(store, say)  # commits off the event loop
        self.say = say
        self.in_process_boxes = in_process_boxes  # emulated boxes without serial (tests)
        self.runs: list[BoxRun] = []
        self.stages = StageKeeper(store, say)
        self._stop_reason: str | None = None
        self._clock: Callable[[], float] = lambda: 0.0
        self._run_minutes: float | None = None  # the run's own bound (--minutes)
        self.store_problem = store_problem or self._last_store_failure
        self._alarm_senders = alarm_senders
        self.alarms: AlarmDesk | None = None
        self.disk_free_mb: float | None = None
        self.disk_every_s = DISK_EVERY_S
        # Records handed to the store, by (session id, record type): what a check of the
        # database after a run (bench/soak.py, the disk-full test) compares the file with.
        self.produced: Counter[tuple[int, str]] = Counter()

    def _last_store_failure(self) -> str | None:
        """The last failed commit of the local store or, for a rig on a lab-wide store, the
        server being out of reach (records wait in the spool meanwhile)."""
        failure = self.store.failure
        if failure is not None:
            return str(failure)
        link = self.forwarder.status() if self.forwarder is not None else None
        if link is not None and not link.reachable:
            return f"{link.text()}" + (f" ({link.problem})" if link.problem else "")
        return None

    @property
    def clock(self) -> Callable[[], float]:
        """Session seconds of this run (every box starts together)."""
        return self._clock

    def stop_all(self, reason: str) -> None:
        self._stop_reason = self._stop_reason or reason
        for run in self.runs:
            if not run.session.finished:
                run.live.request_stop(reason)

    # ------------------------------------------------------------ operator controls

    def find(self, box: str) -> BoxRun:
        for run in self.runs:
            if run.config.name == box:
                return run
        raise KeyError(box)

    def control(self, box: str, action: ControlAction, origin: str) -> None:
        """Pause, resume or stop one box's session (the status page's controls call this).

        Raises KeyError for an unknown box and ValueError when the session has ended.
        """
        run = self.find(box)
        if run.session.finished:
            raise ValueError(f"session of box '{box}' has ended")
        action = ControlAction(action)
        if action is ControlAction.STOP:
            run.live.request(action, f"stopped by operator ({origin})")
        else:
            run.live.request(action, origin)

    def annotate(self, box: str, text: str, origin: str) -> int:
        """Store a free-text note on the box's current session at the session time now.

        Raises KeyError for an unknown box; returns the annotation's id.
        """
        run = self.find(box)
        t = run.ended.t if run.ended is not None else run.live.clock()
        with self.writer.direct() as store:
            return store.write_annotation(run.session_id, text, origin, t=t, wall_time=wall_now())

    def store_link(self) -> StoreLink | None:
        """The rig's link to a lab-wide store (reachable, waiting, unreachable since), None
        with a local store only: what a "store unreachable" alarm reads."""
        return None if self.forwarder is None else self.forwarder.status()

    def store_line(self) -> str | None:
        """The page's store line ("store: forwarding 12"), None with a local store only."""
        link = self.store_link()
        return None if link is None else link.text()

    def _remote_control(self, control: dict[str, Any]) -> None:
        """A control asked through the lab-wide store (`vigil serve`'s page): applied here on
        the lab's loop like the page's own, answered back through the forwarder."""
        from server.lab.page_feed import answer

        ask = {**control, "origin": f"{control['origin']} via the lab-wide store"}
        try:
            reply = answer(self, ask)
        except Exception as exc:  # a failing control must not end the lab
            reply = {"status": 500, "detail": f"{type(exc).__name__}: {exc}"}
        assert self.forwarder is not None
        self.forwarder.answered(int(control["id"]), reply)

    def _publisher(self, box: BoxConfig, session_id: int, status: BoxStatus) -> Callable[[list[Record]], None]:
        def publish(records: list[Record]) -> None:
            for record in records:
                status.observe(record)
                self.produced[(session_id, type(record).__name__)] += 1
                if isinstance(record, SessionEnded):
                    self.say(
                        f"{box.name}: session {session_id} ended ({record.reason}); "
                        f"{record.trials} trials, {record.rewards} rewards"
                    )
                self.writer.write(session_id, record)
                if isinstance(record, SessionEnded):
                    self.stages.after_session(box, session_id, self.writer)

        return publish

    # ------------------------------------------------------------ the run

    async def run(self, minutes: float | None = None) -> list[BoxRun]:
        loop = asyncio.get_running_loop()
        self._run_minutes = minutes or None
        try:
            self.alarms = AlarmDesk(
                self.config.alarms, self.config.lab, self.config.web.no_response_minutes,
                say=self.say, senders=self._alarm_senders,
            )  # fmt: skip
        except AlarmSetupError as exc:
            raise LabError(str(exc)) from None
        closed = self.store.close_interrupted(wall_now())
        if closed:
            self.say(f"closed {len(closed)} interrupted session(s) from an earlier run: {closed}")
        self.config = replace(self.config, boxes=tuple(self.stages.today(box) for box in self.config.boxes))
        t0 = loop.time()

        def clock() -> float:
            return loop.time() - t0

        self._clock = clock
        # Every protocol's estimator built once before any box is connected: a compiled
        # kernel's first use loads (in a fresh install: compiles) its machine code, seconds
        # that must not fall between a box's handshake and the start of its session.
        for protocol in {id(b.protocol): b.protocol for b in self.config.boxes}.values():
            make_estimator(protocol)
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
            self.runs.append(self._begin(box, link, clock))

        with on_stop_signals(loop, lambda sig: self.stop_all(f"stopped by signal ({sig.name})")):
            self.writer.start()
            self.alarms.start()
            if self.forwarder is not None:

                def hand_over(control: dict[str, Any]) -> None:
                    loop.call_soon_threadsafe(self._remote_control, control)

                self.forwarder.on_control = hand_over
                self.forwarder.start()
            limit = asyncio.create_task(self._time_limit(minutes)) if minutes else None
            link_tasks = [asyncio.create_task(run.link.run()) for run in self.runs]
            link_tasks.append(asyncio.create_task(self._watch_alarms(self.alarms)))
            try:
                results = await asyncio.gather(*(run.live.run() for run in self.runs), return_exceptions=True)
                for run, result in zip(self.runs, results):
                    if isinstance(result, BaseException):
                        self.say(f"{run.config.name}: session {run.session_id} failed: {result!r}")
            finally:
                # Sessions end with outputs off: wait for the box to acknowledge, then close.
                await close_links([run.link for run in self.runs])
                if folder is not None:
                    shutil.rmtree(folder, ignore_errors=True)
                others = link_tasks + ([limit] if limit else [])
                for task in others:
                    task.cancel()
                await asyncio.gather(*others, return_exceptions=True)
                try:
                    self.writer.close()  # everything queued is committed before the lab returns
                finally:
                    await self._last_alarms(self.alarms)
                    if self.forwarder is not None:
                        left = self.forwarder.stop()
                        if left.waiting:
                            self.say(f"{left.text()}: kept in the spool, forwarded at the next start")
        return self.runs

    async def _watch_alarms(self, desk: AlarmDesk) -> None:
        """Look for alarm conditions about once a second, for as long as the sessions run."""
        loop = asyncio.get_running_loop()
        next_disk = 0.0
        while True:
            if loop.time() >= next_disk:
                next_disk = loop.time() + self.disk_every_s
                self.disk_free_mb = await loop.run_in_executor(None, free_mb, self.store.path)
            self._check_alarms(desk)
            await asyncio.sleep(ALARM_EVERY_S)

    def _check_alarms(self, desk: AlarmDesk) -> None:
        desk.check(
            self._clock(), [run.facts() for run in self.runs], self.store_problem(), self.disk_free_mb,
            {run.name: run.status.alarms for run in self.runs},
        )  # fmt: skip

    async def _last_alarms(self, desk: AlarmDesk) -> None:
        """The last word on every box (ended sessions clear their conditions), then the
        channels' grace period to send it, off the loop."""
        loop = asyncio.get_running_loop()
        self._check_alarms(desk)
        await loop.run_in_executor(None, desk.close)

    def _begin(self, box: BoxConfig, link: BoxLink, clock: Callable[[], float]) -> BoxRun:
        """Store a new session for the box and set it up against its link."""
        seed = box.seed if box.seed is not None else secrets.randbits(63)
        state = animal_estimator_state(self.store.conn, box.animal, box.protocol)
        session = build_session(box.protocol, seed, self.config.caps, estimator_state=state)
        session_id = self.store.begin_session(
            box.name, box.animal, box.protocol.name, box.protocol.source,
            box.protocol.sha256, seed, wall_now(), self._settings(box, session),
        )  # fmt: skip
        status = BoxStatus()
        live = LiveSession(session, link, clock, self._publisher(box, session_id, status))
        self.say(f"{box.name}: animal {box.animal}, protocol '{box.protocol.name}', session {session_id}")
        limit = None if self._run_minutes is None else self._run_minutes * 60.0
        return BoxRun(box, session, session_id, link, live, status, run_limit_s=limit)

    def _settings(self, box: BoxConfig, session: Session) -> dict[str, Any]:
        """What the store keeps of how the session was set up."""
        caps = self.config.caps
        emulate = box.emulate
        limits = session.limits
        return {
            "caps": {"max_rewards": caps.max_rewards, "max_minutes": caps.max_minutes},
            # what binds this session: the protocol's limits within the lab's hard caps
            "limits": {"max_rewards": limits.max_rewards, "max_minutes": limits.max_minutes},
            "run_minutes": self._run_minutes,  # the run's --minutes, which may end it before the cap
            "emulate": None if emulate is None else {
                "agent": emulate.agent, "seed": emulate.seed, "traits": emulate.traits, "faults": emulate.faults,
            },
            "port": box.port,
            "stage": self.stages.running.get(box.name),
            "protocol_settings": box.protocol.settings,
            "subject": box.subject,  # species, sex, age ... as the lab config gave them
            # Line kinds let a reader of the store tell a feeder pulse from a sync pulse.
            "wiring": {
                "inputs": {n: line.kind for n, line in box.protocol.wiring.inputs.items()},
                "outputs": {n: line.kind for n, line in box.protocol.wiring.outputs.items()},
            },
        }  # fmt: skip

    async def _connect(self, clock: Callable[[], float], folder: Path | None) -> Sequence[BoxLink]:
        """A link per box, each greeted and checked against its protocol's wiring before
        any session starts; every box's problem is reported at once."""
        links = [
            make_box(box, clock, folder=folder, say=self.say, in_process=self.in_process_boxes)
            for box in self.config.boxes
        ]
        results = await asyncio.gather(*(link.connect() for link in links), return_exceptions=True)
        failures = [r for r in results if isinstance(r, BaseException)]
        if failures:
            await close_links(links)
            bugs = [r for r in failures if not isinstance(r, LinkError)]
            if bugs:
                raise bugs[0]
            raise LabError("\n".join(str(r) for r in failures))
        return links

    async def _time_limit(self, minutes: float) -> None:
        await asyncio.sleep(minutes * 60.0)
        self.say(f"run time limit of {minutes:g} min (--minutes) reached; ending sessions")
        self.stop_all(RUN_TIME_LIMIT)


def free_mb(database: Path | str) -> float | None:
    """Free space for an unprivileged writer on the database's filesystem, in MB (None if
    unknown, or for a server's URL: a rig writes to its local spool file, a Path)."""
    if isinstance(database, str) and "://" in database:
        return None
    try:
        return shutil.disk_usage(Path(database).resolve().parent).free / 1e6
    except OSError:
        return None
