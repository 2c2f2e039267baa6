"""The session core: one animal's session as a pure state machine (sans-I/O).

It is fed input events with their time and asked to advance to the current time; it
answers with output commands, its next deadline, and a stream of records. It never reads a
clock, touches a port or awaits anything, so the live driver, the virtual-time rehearsal and
the tests all run exactly the same logic.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from server.engine.block_progress import PERFORMANCE_CRITERIA, BlockProgress
from server.engine.caps import EffectiveLimits, HardCaps, effective_limits
from server.engine.records import (
    BlockStarted,
    Command,
    EstimateUpdated,
    EventLogged,
    InputEvent,
    Record,
    SessionEnded,
    SessionStarted,
    SetOutput,
    TrialRecord,
)
from server.engine.session_controls import SessionControls
from server.engine.step_plans import OutputPlan, StepPlan, output_commands, output_plan, pulse_commands, step_plans
from server.engine.timing import DurationDraw, ScheduleState
from server.protocol.model import END_SESSION, END_TRIAL, Block, Protocol, Step, TrialType

# A trial may pass through this many steps in one instant (draws, zero waits) before the
# session declares the protocol stuck in a loop rather than spinning forever.
MAX_STEPS_PER_INSTANT = 1000

TrialObserver = Callable[["Session", TrialRecord], None]


class ProtocolLoop(Exception):
    pass


class _Trial:
    """Mutable state of the trial in progress."""

    __slots__ = (
        "index", "type", "plans", "t_start", "plan", "step_t0", "deadline", "schedule",
        "steps", "counts", "first_s", "choice", "response", "latency_s", "correct",
        "omission", "pellets", "offered_choice", "cut_reason",
    )  # fmt: skip

    def __init__(self, index: int, trial_type: TrialType, plans: dict[str, StepPlan], t: float):
        self.index = index
        self.type = trial_type
        self.plans = plans  # step name -> plan, for this trial type
        self.t_start = t
        self.plan: StepPlan | None = None  # the step in progress (None before the first / once left)
        self.step_t0 = t
        self.deadline = math.inf
        self.schedule: ScheduleState | None = None
        self.steps: list[tuple[str, float]] = []
        self.counts: dict[str, int] = {}
        self.first_s: dict[str, float] = {}
        self.choice: str | None = None
        self.response: str | None = None
        self.latency_s: float | None = None
        self.correct: bool | None = None
        self.omission = False
        self.pellets = 0
        self.offered_choice = False  # went through a step with `choose`
        self.cut_reason: str | None = None  # set when something outside cut the trial short

    @property
    def step(self) -> Step:
        return self.plan.step


class Session(SessionControls):
    """One session of one protocol on one box, driven by whoever owns the clock."""

    def __init__(
        self,
        protocol: Protocol,
        seed: int,
        caps: HardCaps = HardCaps(),
        *,
        log_events: bool = True,
        estimator=None,
    ):
        self.protocol = protocol
        self.seed = seed
        self.rng = np.random.default_rng(seed)
        self.limits: EffectiveLimits = effective_limits(protocol.limits, caps)
        self.log_events = log_events
        self.observers: list[TrialObserver] = []
        # Learning-model estimator (server.models): pure, fed (choice, reward) after each
        # choice trial; its latest estimate is what rules and the status page read.
        self.estimator = estimator
        self._estimate = None
        self._estimate_stale = False
        self.finished = False
        self.end_reason: str | None = None
        self.ended_at: float | None = None  # session time of the end
        self.trials_done = 0
        self.rewards = 0
        self.reversals = 0
        self.iti_scale = 1.0
        self.iti_fixed: float | None = None
        self.alarms: list[tuple[float, str]] = []
        self._probe_blocks: dict[str, Block] = {}
        self.active_outputs: set[str] = set()  # held outputs the session has switched on
        self.block: BlockProgress | None = None
        self._trial: _Trial | None = None
        self._iti_end = math.inf
        self._t_limit = self.limits.max_minutes * 60.0
        self._out: list[Command] = []
        self._records: list[Record] = []
        self._extra_swaps: list[tuple[str, str]] = []
        self._blocks_entered = 0
        # (block, trials, criterion met or None) for each block left; rehearsal reports it
        self.block_log: list[tuple[str, int, str | None]] = []
        self.first_criterion_trial: int | None = None
        self._cap_reached = False
        self._pending_end: str | None = None
        self._itis = {b.name: DurationDraw(b.iti or protocol.iti, self.rng) for b in protocol.blocks}
        self._block_end = math.inf  # when the current block's time criterion runs out
        self._commands = output_commands(protocol.wiring)
        self._pulses = pulse_commands(protocol.wiring)
        self._plans = step_plans(protocol, self._commands, self.rng)
        self._at_start = output_plan(protocol.at_start, self._commands)
        self._option_of: dict[str, str] = {}  # input -> option label (the first, as option_for_input)
        for option in protocol.options.values():
            self._option_of.setdefault(option.input, option.label)
        self._started = False
        self._paused_at: float | None = None
        self._resume_outputs: set[str] = set()

    # ================================================================ driver interface

    @property
    def next_deadline(self) -> float:
        """Session time at which `advance` must next be called (inf when finished)."""
        if self.finished:
            return math.inf
        if self._paused_at is not None:
            return self._t_limit
        trial = self._trial
        deadline = trial.deadline if trial is not None else self._iti_end
        if self._t_limit < deadline:
            deadline = self._t_limit
        return self._block_end if self._block_end < deadline else deadline

    def _reset_block_end(self) -> None:
        """When a block with a time criterion runs out, even in the middle of a trial; kept
        up to date whenever the block or its start time changes."""
        block = self.block
        if block is None or block.block.until.minutes is None:
            self._block_end = math.inf
        else:
            self._block_end = block.t0 + block.block.until.minutes * 60.0

    @property
    def estimate(self):
        """The estimator's latest Estimate (None before the first choice trial)."""
        if self._estimate_stale:
            self._estimate = self.estimator.estimate()
            self._estimate_stale = False
        return self._estimate

    @property
    def trial_index(self) -> int:
        return self._trial.index if self._trial is not None else self.trials_done

    @property
    def step_name(self) -> str | None:
        return self._trial.plan.step.name if self._trial is not None and self._trial.plan is not None else None

    def take_records(self) -> list[Record]:
        records, self._records = self._records, []
        return records

    def start(self, t: float = 0.0) -> list[Command]:
        if self._started:
            raise RuntimeError("session already started")
        self._started = True
        first = self.protocol.blocks[0]
        self._records.append(SessionStarted(t, self.protocol.name, self.seed, first.name))
        self._apply(self._at_start, t)
        self._enter_block(first, t, "session start")
        self._begin_trial(t)
        return self._flush()

    def feed(self, event: InputEvent, t: float) -> list[Command]:
        """An input edge at session time t (events must arrive in time order)."""
        if self.log_events:
            self._records.append(
                EventLogged(
                    t, "input", event.name, 1.0 if event.rising else 0.0, event.device_t_us, event.device_seq
                )  # fmt: skip
            )
        if self.finished or self._paused_at is not None:
            return []
        self._catch_up(t)
        trial = self._trial
        if event.rising and trial is not None and not self.finished:
            self._respond(trial, event.name, t)
        out, self._out = self._out, []  # _flush, inline on the busiest path
        return out

    def advance(self, t: float) -> list[Command]:
        """Run every deadline that has passed by time t."""
        if not self.finished:
            self._catch_up(t)
        out, self._out = self._out, []  # _flush, inline on the busiest path
        return out

    def stop(self, t: float, reason: str) -> list[Command]:
        """End the session now (operator, time limit, link failure...): outputs to safe state."""
        if not self.finished:
            self._end_session(t, reason)
        return self._flush()

    def safe_state(self) -> list[Command]:
        """Commands that put every held output in its safe (inactive) state."""
        return [off for name, (off, _) in self._commands.items() if name not in self._pulses]

    # ================================================================ internals: time

    def _catch_up(self, t: float) -> None:
        guard = 0
        while not self.finished:
            guard += 1  # every pass counts, the block-time branch too: no path loops forever
            if guard > MAX_STEPS_PER_INSTANT * 10:
                self._end_session(t, "error: protocol does not advance in time")
                return
            if t >= self._t_limit:
                self._end_session(self._t_limit, "session time limit")
                return
            if self._paused_at is not None:
                return
            trial = self._trial
            deadline = trial.deadline if trial is not None else self._iti_end
            block_end = self._block_end
            if t >= block_end and block_end < deadline:
                self._block_time_up(block_end)
                continue
            if t < deadline:
                return
            if trial is not None:
                self._timeout(trial, deadline)
            else:
                self._begin_trial(deadline)

    # ================================================================ internals: trials

    def _begin_trial(self, t: float) -> None:
        assert self.block is not None
        type_name = self.block.next_trial_type()
        trial_type = self.protocol.trial_types[type_name]
        trial = _Trial(self.trials_done + 1, trial_type, self._plans[type_name], t)
        self._trial = trial
        self._iti_end = math.inf
        self._goto(trial, trial_type.steps[0].name, t)

    def _goto(self, trial: _Trial, target: str, t: float) -> None:
        hops = 0
        plans = trial.plans
        while True:
            plan = trial.plan
            if plan is not None and plan.on_leave is not None:
                self._apply(plan.on_leave, t)
            if target == END_TRIAL:
                self._end_trial(trial, t, interrupted=False)
                return
            plan = trial.plan = plans[target]
            step = plan.step
            trial.step_t0 = t
            trial.steps.append((step.name, t))
            if self.log_events:
                self._log(t, "step", step.name, detail={"trial": trial.index})
            if step.choose:
                trial.offered_choice = True
            if plan.on_enter is not None:
                self._apply(plan.on_enter, t)
                if self._trial is not trial:  # the reward cap ended the session mid-step
                    return
            if step.draw:
                target = self._draw_target(step)
                hops += 1
                if hops > MAX_STEPS_PER_INSTANT:
                    self._end_session(t, "error: protocol loops between steps without waiting")
                    return
                continue
            wait = plan.wait
            trial.deadline = t + wait.draw() if wait is not None else math.inf
            schedule = trial.schedule = plan.schedule
            if schedule is not None:
                schedule.begin(t)
            if wait is not None and trial.deadline <= t:
                # zero wait: move on now, but count it against the loop guard
                hops += 1
                if hops > MAX_STEPS_PER_INSTANT:
                    self._end_session(t, "error: protocol loops between steps without waiting")
                    return
                if plan.awaits_response:
                    trial.omission = True
                target = step.next
                continue
            return

    def _draw_target(self, step: Step) -> str:
        u = self.rng.random()
        edge = 0.0
        for target, p in step.draw:
            edge += p
            if u < edge:
                return target
        return step.draw[-1][0]

    def _timeout(self, trial: _Trial, t: float) -> None:
        plan = trial.plan
        if plan.awaits_response:
            trial.omission = True
        self._goto(trial, plan.step.next, t)

    def _respond(self, trial: _Trial, input_name: str, t: float) -> None:
        plan = trial.plan
        step = plan.step
        key = plan.count_keys.get(input_name) or f"{step.name}.{input_name}"
        counts = trial.counts
        counts[key] = counts.get(key, 0) + 1
        if key not in trial.first_s:
            trial.first_s[key] = t - trial.step_t0
        if step.choose:
            label = self._option_of.get(input_name)
            if label is not None and label in step.choose:
                self._choose(trial, step, label, input_name, t)
                return
        target = step.respond.get(input_name)
        if target is not None:
            trial.response = input_name
            trial.latency_s = t - trial.step_t0
            self._goto(trial, target, t)
            return
        schedule = trial.schedule
        if schedule is not None and schedule.schedule.input == input_name:
            if schedule.respond(t):
                if trial.response is None:
                    trial.response = input_name
                    trial.latency_s = t - trial.step_t0
                self._goto(trial, schedule.schedule.then, t)

    def _choose(self, trial: _Trial, step: Step, label: str, input_name: str, t: float) -> None:
        block = self.block
        assert block is not None
        trial.choice = label
        trial.response = input_name
        trial.latency_s = t - trial.step_t0
        trial.correct = block.correct(label, step.choose)
        # Draw even when outcomes are withheld, so a probe block does not shift later draws.
        win = self.rng.random() < block.contingencies[label]
        if block.block.withhold_outcomes:
            win = False
        self._goto(trial, step.if_rewarded if win else step.if_unrewarded, t)

    def _end_trial(self, trial: _Trial, t: float, interrupted: bool, cut: str | None = None) -> None:
        assert self.block is not None
        self._trial = None
        self.trials_done = trial.index
        block = self.block
        # A trial the link cut (the box was unreachable part of it) is stored as interrupted
        # and teaches neither the criteria nor the estimator, but the session goes on.
        cut_outside = trial.cut_reason is not None
        cut = cut or trial.cut_reason
        block.record(None if interrupted or cut_outside else trial.correct, trial.pellets)
        ending = self._session_end_due(t)
        # Every field but iti_s, in TrialRecord's order. The record takes its place in the
        # stream now, ahead of what the trial causes (estimate, rule firings, session end),
        # but its ITI is drawn only after the rules ran: observers see it with iti_s 0.0 and
        # the stream gets it again with the ITI (building it anew from these fields is
        # cheaper than dataclasses.replace). With no observer it is built once, with the ITI.
        head = (
            trial.index, block.block.name, block.index, trial.type.name, trial.t_start, t,
            trial.choice, trial.response, trial.latency_s, trial.pellets > 0,
            float(trial.pellets), trial.correct,
            trial.omission and trial.choice is None and trial.response is None,
            interrupted or cut_outside,
        )  # fmt: skip
        tail = (tuple(trial.steps), trial.counts, trial.first_s, {"cut_by": cut} if cut else {})
        record = TrialRecord(*head, 0.0, *tail) if interrupted or self.observers else None
        at = len(self._records)
        self._records.append(record)  # None only until filled in below, unseen meanwhile
        if interrupted:
            return
        if self.estimator is not None and trial.offered_choice and not cut_outside:
            if self.log_events:
                self._estimate = self.estimator.update(trial.choice, float(trial.pellets))
                self._records.append(EstimateUpdated(trial.index, self.estimator.model.name, self._estimate))
            else:  # rehearsal: summarise only if a rule asks for the estimate
                self.estimator.update(trial.choice, float(trial.pellets), summarise=False)
                self._estimate = None
                self._estimate_stale = True
        for observer in self.observers:
            observer(self, record)
        nxt = met = None
        if self.block is block:  # no rule switched blocks
            nxt, met = self._block_criterion(block, t)
        if nxt == END_SESSION:
            ending = f"protocol complete ({block.block.name}: {met})"
        else:
            ending = ending or self._pending_end
        if ending is not None:
            if record is None:
                self._records[at] = TrialRecord(*head, 0.0, *tail)
            self._end_session(t, ending)
            return
        # Drawn after the rules ran, so an ITI change applies to the interval right after
        # the trial that triggered it; the record then carries the ITI actually used.
        iti = self._next_iti(block.block.name)
        self._records[at] = TrialRecord(*head, iti, *tail)
        if nxt is not None:
            self._enter_block(self._block_named(nxt), t, met)
        self._iti_end = t + iti
        if iti <= 0:
            self._begin_trial(t)

    def _block_criterion(self, block: BlockProgress, t: float) -> tuple[str | None, str | None]:
        """(next block, what was met) when the block's criterion holds, else (None, None)."""
        finished = block.finished(t)
        if finished is None:
            return None, None
        which, met = finished
        if self.first_criterion_trial is None and which in PERFORMANCE_CRITERIA:
            self.first_criterion_trial = self.trials_done
        return block.block.next or self._following_block(block.block.name), met

    def _block_time_up(self, t: float) -> None:
        """A timed block ran out: cut the trial in progress short and move to the next block."""
        assert self.block is not None
        trial = self._trial
        if trial is not None:
            if trial.plan.on_leave is not None:
                self._apply(trial.plan.on_leave, t)
            trial.plan = None  # already left
            self._end_trial(trial, t, interrupted=False, cut="block time")
            return  # _end_trial ran the block criterion
        nxt, met = self._block_criterion(self.block, t)
        if nxt == END_SESSION:
            self._end_session(t, f"protocol complete ({self.block.block.name}: {met})")
        elif nxt is not None:
            self._enter_block(self._block_named(nxt), t, met)

    def _next_iti(self, block_name: str) -> float:
        drawn = self._itis[block_name].draw()  # drawn even when overridden: keeps draws aligned
        iti = self.iti_fixed if self.iti_fixed is not None else self.iti_scale * drawn
        bounds = self.protocol.iti_bounds
        if bounds is not None:
            iti = min(max(iti, bounds[0]), bounds[1])
        return iti

    def best_options(self) -> frozenset[str]:
        """Options with the highest reward probability now (empty when all are equal)."""
        if self.block is None or not self.block.contingencies:
            return frozenset()
        c = self.block.contingencies
        top = max(c.values())
        return frozenset(k for k, v in c.items() if v == top) if top > min(c.values()) else frozenset()

    def _count_reversal(self, before: frozenset[str]) -> None:
        after = self.best_options()
        if before and after and after != before:
            self.reversals += 1

    def _session_end_due(self, t: float) -> str | None:
        if self._cap_reached:
            return "reward cap reached"
        if self.limits.max_trials is not None and self.trials_done >= self.limits.max_trials:
            return "trial limit reached"
        return None

    def _following_block(self, name: str) -> str:
        names = [b.name for b in self.protocol.blocks]
        if name not in names:  # a probe made by a rule goes where the rule said
            return self._probe_blocks[name].next or END_SESSION
        i = names.index(name)
        return names[i + 1] if i + 1 < len(names) else END_SESSION

    def _block_named(self, name: str) -> Block:
        return self._probe_blocks.get(name) or self.protocol.block(name)

    def _enter_block(self, block: Block, t: float, why: str) -> None:
        before = self.best_options()
        if self.block is not None:
            self.block_log.append((self.block.block.name, self.block.trials, why))
        self._blocks_entered += 1
        name = block.name
        self.block = BlockProgress(self.protocol, block, self._blocks_entered, t, self.rng, self._extra_swaps)
        self._reset_block_end()
        self._count_reversal(before)
        self._records.append(
            BlockStarted(t, name, self._blocks_entered, dict(self.block.contingencies), block.withhold_outcomes)
        )
        self._log(t, "block", name, detail={"why": why})

    def _end_session(self, t: float, reason: str) -> None:
        if self.finished:
            return
        trial = self._trial
        if trial is not None:
            self._end_trial(trial, t, interrupted=True)
        self.finished = True
        self.end_reason = reason
        self.ended_at = t
        if self.block is not None:
            self.block_log.append((self.block.block.name, self.block.trials, None))
        for command in self.safe_state():
            self._switch(command.name, command, t)
        self._records.append(SessionEnded(t, reason, self.trials_done, self.rewards))

    # ================================================================ internals: outputs

    def _apply(self, actions: OutputPlan | None, t: float) -> None:
        """Carry out a step's (or the session start's) output actions: off, on, then pulses.

        Does what `_switch` does for each output in turn, a group at a time."""
        if actions is None:
            return
        if actions.switch:
            active = self.active_outputs
            active.difference_update(actions.off)
            active.update(actions.on)
            self._out += actions.switch
            if self.log_events:
                records = self._records
                records += [EventLogged(t, "output", name, 0.0) for name in actions.off]
                records += [EventLogged(t, "output", name, 1.0) for name in actions.on]
        for name in actions.pulse:
            self._pulse(name, t)

    def _set(self, name: str, active: bool, t: float) -> None:
        off, on = self._commands[name]
        self._switch(name, on if active else off, t)

    def _switch(self, name: str, command: SetOutput, t: float) -> None:
        if command.active:
            self.active_outputs.add(name)
        else:
            self.active_outputs.discard(name)
        self._out.append(command)
        if self.log_events:
            self._records.append(EventLogged(t, "output", name, 1.0 if command.active else 0.0))

    def _pulse(self, name: str, t: float) -> None:
        command, feeder = self._pulses[name]
        if feeder:
            if self.block is not None and self.block.block.withhold_outcomes:
                self._log(t, "pulse", name, detail={"withheld": "outcomes withheld in this block"})
                return
            if self.rewards >= self.limits.max_rewards:
                self._cap_reached = True
                self._log(t, "cap", name, detail={"max_rewards": self.limits.max_rewards})
                return
            self.rewards += 1
            if self._trial is not None:
                self._trial.pellets += 1
            if self.rewards >= self.limits.max_rewards:
                self._cap_reached = True
        self._out.append(command)
        if self.log_events:
            self._records.append(EventLogged(t, "pulse", name, float(command.ms)))

    def _log(self, t: float, kind: str, name: str, detail: dict | None = None) -> None:
        if self.log_events:
            self._records.append(EventLogged(t, kind, name, None, detail=detail))

    def _flush(self) -> list[Command]:
        out, self._out = self._out, []
        return out
