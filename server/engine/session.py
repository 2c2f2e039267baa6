"""The session core: one animal's session as a pure state machine (sans-I/O).

It is fed input events with their time and asked to advance to the current time; it
answers with output commands, its next deadline, and a stream of records. It never reads a
clock, touches a port or awaits anything, so the live driver, the virtual-time rehearsal and
the tests all run exactly the same logic.

Why one long module: the session is one state machine over one set of state (the trial in
progress, the clock's deadlines, the outputs, the closed loop), and each transition touches
most of it; split across classes it would be harder to follow, not easier. What stands on
its own lives beside it: blocks (`block_sequence.py`, `block_progress.py`), the trial in
progress (`trial_state.py`), steps prepared once (`step_plans.py`), draws and schedules
(`timing.py`), caps (`caps.py`), the pause and rule-action reports (`session_controls.py`).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from server.engine.block_progress import PERFORMANCE_CRITERIA, BlockProgress
from server.engine.block_sequence import BlockSequence
from server.engine.caps import EffectiveLimits, HardCaps, effective_limits
from server.engine.records import (
    Command,
    EstimateUpdated,
    EventLogged,
    InputEvent,
    Record,
    RuleFired,
    SessionEnded,
    SessionStarted,
    SetOutput,
    TrialOutcome,
    TrialRecord,
)
from server.engine.seams import EstimateSummary, RuleDecision, TrialEstimator, TrialRules
from server.engine.session_controls import PauseState, action_done
from server.engine.step_plans import OutputPlan, output_commands, output_plan, pulse_commands, step_plans
from server.engine.timing import DurationDraw
from server.engine.trial_state import TrialState
from server.protocol.model import END_SESSION, END_TRIAL, Block, Protocol, RewardWalk, RuleAction, Step

# A trial may pass through this many steps in one instant (draws, zero waits) before the
# session declares the protocol stuck in a loop rather than spinning forever.
MAX_STEPS_PER_INSTANT = 1000


class Session:
    """One session of one protocol on one box, driven by whoever owns the clock.

    `estimator` and `rules` close the loop: after every trial the session hands the trial
    to the estimator (choice trials), then to the rules, and carries out what they decide.
    `log_events` keeps every input, output and step in the record stream (the live lab);
    `summarise_estimates` summarises the estimate after every update and puts it in the
    stream (the live lab) rather than only when a rule reads it (rehearsal).
    """

    def __init__(
        self,
        protocol: Protocol,
        seed: int,
        caps: HardCaps = HardCaps(),
        *,
        log_events: bool = True,
        summarise_estimates: bool = True,
        estimator: TrialEstimator | None = None,
        rules: TrialRules | None = None,
    ):
        self.protocol = protocol
        self.seed = seed
        self.rng = np.random.default_rng(seed)
        self.limits: EffectiveLimits = effective_limits(protocol.limits, caps)
        self.log_events = log_events
        self.summarise_estimates = summarise_estimates
        self.estimator = estimator
        self.rules = rules
        self._closes_loop = estimator is not None or rules is not None
        self._estimate: EstimateSummary | None = None
        self._estimate_stale = False
        self.rule_firings: list[RuleFired] = []  # every firing of this session, in order
        self.finished = False
        self.end_reason: str | None = None
        self.ended_at: float | None = None  # session time of the end
        self.trials_done = 0
        self.rewards = 0
        self.iti_scale = 1.0
        self.iti_fixed: float | None = None
        self.alarms: list[tuple[float, str]] = []
        self.active_outputs: set[str] = set()  # held outputs the session has switched on
        self.blocks = BlockSequence(protocol, self.rng)
        self._trial: TrialState | None = None
        self._iti_end = math.inf
        self._t_limit = self.limits.max_minutes * 60.0
        self._out: list[Command] = []
        self._records: list[Record] = []
        self.first_criterion_trial: int | None = None
        self._cap_reached = False
        self._pending_end: str | None = None
        self._itis = {b.name: DurationDraw(b.iti or protocol.iti, self.rng) for b in protocol.blocks}
        self._commands = output_commands(protocol.wiring)
        self._pulses = pulse_commands(protocol.wiring)
        self._plans = step_plans(protocol, self._commands, self.rng)
        self._at_start = output_plan(protocol.at_start, self._commands)
        self._option_of: dict[str, str] = {}  # input -> option label (the first, as option_for_input)
        for option in protocol.options.values():
            self._option_of.setdefault(option.input, option.label)
        self._started = False
        self._pause: PauseState | None = None

    # ================================================================ driver interface

    @property
    def next_deadline(self) -> float:
        """Session time at which `advance` must next be called (inf when finished)."""
        if self.finished:
            return math.inf
        if self._pause is not None:
            return self._t_limit
        trial = self._trial
        deadline = trial.deadline if trial is not None else self._iti_end
        if self._t_limit < deadline:
            deadline = self._t_limit
        block_end = self.blocks.end_time
        return block_end if block_end < deadline else deadline

    @property
    def estimate(self) -> EstimateSummary | None:
        """The estimator's latest summary (None before the first choice trial)."""
        if self._estimate_stale and self.estimator is not None:
            self._estimate = self.estimator.estimate()
            self._estimate_stale = False
        return self._estimate

    @property
    def block(self) -> BlockProgress | None:
        """The block in progress."""
        return self.blocks.current

    @property
    def block_log(self) -> list[tuple[str, int, str | None]]:
        return self.blocks.log

    @property
    def reversals(self) -> int:
        return self.blocks.reversals

    @property
    def in_probe(self) -> bool:
        return self.blocks.in_probe

    @property
    def paused(self) -> bool:
        return self._pause is not None

    def best_options(self) -> frozenset[str]:
        """Options with the highest reward probability now (empty when all are equal); in a
        two-stage task, the first choices with the highest expected reward."""
        two_stage = self.protocol.two_stage
        block = self.blocks.current
        if two_stage is None or block is None:
            return self.blocks.best_options()
        values = {o: two_stage.expected_reward(o, block.contingencies) for o in two_stage.first}
        top = max(values.values())
        return frozenset(o for o, v in values.items() if v == top) if top > min(values.values()) else frozenset()

    @property
    def trial_index(self) -> int:
        return self._trial.index if self._trial is not None else self.trials_done

    @property
    def step_name(self) -> str | None:
        trial = self._trial
        return trial.plan.step.name if trial is not None and trial.plan is not None else None

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
        if self.finished or self._pause is not None:
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

    def safe_state(self) -> list[SetOutput]:
        """Commands that put every held output in its safe (inactive) state."""
        return [off for name, (off, _) in self._commands.items() if name not in self._pulses]

    # ================================================================ from outside the protocol

    def pause(self, t: float, origin: str = "operator") -> list[Command]:
        """Freeze the session clock and put outputs in their safe state until `resume`.

        Inputs during a pause are logged but change nothing. The session time limit keeps
        running: it bounds the animal's time in the box, paused or not.
        """
        if self.finished or self._pause is not None:
            return []
        self._catch_up(t)
        if self.finished:
            return self._flush()
        self._pause = PauseState(t, frozenset(self.active_outputs))
        for command in self.safe_state():
            self._switch(command.name, command, t)
        self._log(t, "pause", "session", detail={"origin": origin})
        return self._flush()

    def resume(self, t: float, origin: str = "operator") -> list[Command]:
        """Continue where the pause left off: every pending deadline moves by the pause."""
        pause = self._pause
        if self.finished or pause is None:
            return []
        shift = t - pause.since
        self._pause = None
        trial = self._trial
        if trial is not None:
            trial.deadline += shift
            trial.step_t0 += shift
            if trial.schedule is not None:
                trial.schedule.armed_at += shift
        else:
            self._iti_end += shift
        self.blocks.shift(shift)
        for name in sorted(pause.outputs):
            self._set(name, True, t)
        self._log(t, "resume", "session", detail={"origin": origin, "paused_s": shift})
        return self._flush()

    def mark_interrupted(self, reason: str) -> None:
        """Flag the trial in progress as interrupted (e.g. the box link was lost during it);
        it runs to its end as usual and is stored with interrupted = true."""
        if self._trial is not None:
            self._trial.cut_reason = reason

    def add_record(self, record: EventLogged) -> None:
        """Put something seen outside the core (by the box link) into the record stream."""
        self._records.append(record)

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
            if self._pause is not None:
                return
            trial = self._trial
            deadline = trial.deadline if trial is not None else self._iti_end
            block_end = self.blocks.end_time
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
        block = self.blocks.current
        assert block is not None
        type_name = block.next_trial_type()
        trial_type = self.protocol.trial_types[type_name]
        trial = TrialState(self.trials_done + 1, trial_type, self._plans[type_name], t)
        self._trial = trial
        self._iti_end = math.inf
        self._goto(trial, trial_type.steps[0].name, t)

    def _goto(self, trial: TrialState, target: str, t: float) -> None:
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
                    self._missed(trial)
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

    def _timeout(self, trial: TrialState, t: float) -> None:
        plan = trial.plan
        assert plan is not None
        if plan.awaits_response:
            self._missed(trial)
        self._goto(trial, plan.step.next, t)

    @staticmethod
    def _missed(trial: TrialState) -> None:
        """A response window ran out: an omission, or in a two-stage trial whose first choice
        was made, a missed second stage (the trial still has its choice)."""
        if trial.state is not None:
            trial.omitted2 = True
        else:
            trial.omission = True

    def _respond(self, trial: TrialState, input_name: str, t: float) -> None:
        plan = trial.plan
        assert plan is not None
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
                self._goto(trial, schedule.schedule.on_met, t)

    def _choose(self, trial: TrialState, step: Step, label: str, input_name: str, t: float) -> None:
        block = self.blocks.current
        assert block is not None
        if step.to_state:
            self._choose_first(trial, step, label, input_name, t)
            return
        if trial.state is not None:  # the second stage of a two-stage trial
            trial.choice2 = label if len(step.choose) > 1 else None
            trial.response2 = input_name
            trial.latency2_s = t - trial.step_t0
        else:
            trial.choice = label
            trial.response = input_name
            trial.latency_s = t - trial.step_t0
            trial.correct = block.correct(label, step.choose)
        # Draw even when outcomes are withheld, so a probe block does not shift later draws.
        win = self.rng.random() < block.contingencies[label]
        if block.block.withhold_outcomes:
            win = False
        self._goto(trial, step.if_rewarded if win else step.if_unrewarded, t)

    def _choose_first(self, trial: TrialState, step: Step, label: str, input_name: str, t: float) -> None:
        """A two-stage trial's first choice: draw the state it leads to and go there."""
        two_stage = self.protocol.two_stage
        assert two_stage is not None  # the protocol reader allows to_state only with it
        trial.choice = label
        trial.response = input_name
        trial.latency_s = t - trial.step_t0
        trial.correct = self._first_choice_correct(label)
        u = self.rng.random()
        row = two_stage.transitions[label]
        edge, state = 0.0, next(reversed(row))
        for name, p in row.items():
            edge += p
            if u < edge:
                state = name
                break
        trial.state = state
        trial.common = state == two_stage.common_state(label)
        self._goto(trial, step.to_state[state], t)

    def _first_choice_correct(self, label: str) -> bool | None:
        """Whether `label` is a first choice with the best expected reward under the second
        stage's current reward probabilities; None when every first choice is as good."""
        best = self.best_options()
        return label in best if best else None

    def _walk_rewards(self, walk: RewardWalk) -> None:
        """One step of every second-stage option's reward probability, reflected at the bounds."""
        two_stage = self.protocol.two_stage
        block = self.blocks.current
        assert two_stage is not None and block is not None
        p = block.contingencies
        for state in two_stage.states.values():
            for label in state.options:
                x = p[label] + self.rng.normal(0.0, walk.sd)
                while not walk.low <= x <= walk.high:
                    x = 2 * walk.low - x if x < walk.low else 2 * walk.high - x
                p[label] = x

    def _end_trial(self, trial: TrialState, t: float, interrupted: bool, cut: str | None = None) -> None:
        block = self.blocks.current
        assert block is not None
        self._trial = None
        self.trials_done = trial.index
        # A trial the link cut (the box was unreachable part of it) is stored as interrupted
        # and teaches neither the criteria nor the estimator, but the session goes on.
        cut_outside = trial.cut_reason is not None
        cut = cut or trial.cut_reason
        block.record(None if interrupted or cut_outside else trial.correct, trial.pellets)
        ending = self._session_end_due(t)
        # The fields of TrialOutcome, and of TrialRecord around its iti_s, in their order.
        head = (
            trial.index, block.block.name, block.index, trial.type.name, trial.t_start, t,
            trial.choice, trial.response, trial.latency_s, trial.pellets > 0,
            float(trial.pellets), trial.correct,
            trial.omission and trial.choice is None and trial.response is None,
            interrupted or cut_outside,
        )  # fmt: skip
        extra: dict[str, Any] = {"cut_by": cut} if cut else {}
        second = trial.second_stage()
        two_stage = self.protocol.two_stage
        if two_stage is not None:  # the reward probabilities this trial was played under
            played = block.contingencies
            extra["reward_probability"] = {o: played[o] for s in two_stage.states.values() for o in s.options}
        tail = (tuple(trial.steps), trial.counts, trial.first_s, extra)
        if interrupted:
            self._records.append(TrialRecord(*head, 0.0, *tail, second=second))
            return
        # The record goes into the stream ahead of what the trial causes (estimate, rule
        # firings, session end), but is built once its ITI is known: after the closed loop.
        at = len(self._records)
        if self._closes_loop:
            self._close_loop(trial, TrialOutcome(*head, *tail, second=second), cut_outside)
        # (next block, what was met) when the block's criterion holds and no rule switched blocks
        moving_on = self._block_criterion(block, t) if self.blocks.current is block else None
        if moving_on is not None and moving_on[0] == END_SESSION:
            ending = f"protocol complete ({block.block.name}: {moving_on[1]})"
        else:
            ending = ending or self._pending_end
        if ending is not None:
            self._records.insert(at, TrialRecord(*head, 0.0, *tail, second=second))
            self._end_session(t, ending)
            return
        # Drawn after the rules ran, so an ITI change applies to the interval right after
        # the trial that triggered it; the record then carries the ITI actually used.
        iti = self._next_iti(block.block.name)
        self._records.insert(at, TrialRecord(*head, iti, *tail, second=second))
        if two_stage is not None and two_stage.walk is not None and self.blocks.current is not None:
            self._walk_rewards(two_stage.walk)
        if moving_on is not None:
            self._enter_block(self.blocks.named(moving_on[0]), t, moving_on[1])
        self._iti_end = t + iti
        if iti <= 0:
            self._begin_trial(t)

    def _close_loop(self, trial: TrialState, outcome: TrialOutcome, cut_outside: bool) -> None:
        """The pipeline after a trial: estimator, then rules, then their decisions carried out."""
        estimator = self.estimator
        if estimator is not None and trial.offered_choice and not cut_outside:
            if self.summarise_estimates:
                self._estimate = estimator.update(trial.choice, float(trial.pellets), second=outcome.second)
                self._records.append(EstimateUpdated(trial.index, estimator.model_name, self._estimate))
            else:  # summarised only if a rule asks for the estimate
                estimator.update(trial.choice, float(trial.pellets), second=outcome.second, summarise=False)
                self._estimate = None
                self._estimate_stale = True
        if self.rules is not None:
            for decision in self.rules.after_trial(outcome, self):
                self._carry_out(decision, outcome)

    def _carry_out(self, decision: RuleDecision, outcome: TrialOutcome) -> None:
        t = outcome.t_end
        done = tuple(self._act(action, t, decision.rule) for action in decision.actions)
        fired = RuleFired(t, outcome.trial, decision.rule, done, decision.values)
        self.rule_firings.append(fired)
        self._records.append(fired)
        if decision.changes_schedule and self.first_criterion_trial is None:
            self.first_criterion_trial = outcome.trial  # what rehearsal reports as criterion

    def _act(self, action: RuleAction, t: float, rule: str) -> dict:
        """Carry out one rule action; returns what was done, for the firing record."""
        kind = action.kind
        why = f"rule {rule}"
        if kind == "switch_block":
            assert action.block is not None
            self._enter_block(self.protocol.block(action.block), t, why)
        elif kind == "reverse":
            assert action.options is not None
            a, b = action.options
            self.blocks.reverse(a, b)
            current = self.blocks.current
            self._log(
                t, "block", "reversal", detail={"swap": [a, b], "now": dict(current.contingencies) if current else {}}
            )
        elif kind == "probe":
            assert action.minutes is not None
            assert self.blocks.current is not None
            base = self.blocks.current.block.name
            probe = self.blocks.make_probe(action.minutes, action.block)
            self._itis.setdefault(probe.name, self._itis[base])  # the probe keeps its block's ITIs
            self._enter_block(probe, t, why)
        elif kind == "set_iti":
            assert action.seconds is not None
            self.iti_fixed, self.iti_scale = action.seconds, 1.0  # within iti_bounds, as every ITI
        elif kind == "scale_iti":
            assert action.factor is not None
            self.iti_scale *= action.factor  # cumulative; the result stays within iti_bounds
        elif kind == "end_session":
            self._pending_end = f"{why}: {action.message}"
        elif kind == "note":
            self._log(t, "note", rule, detail={"text": action.message})
        else:
            self._log(t, "alarm", rule, detail={"message": action.message})
            self.alarms.append((t, action.message or ""))
        return action_done(action, self.iti_scale)

    def _block_criterion(self, block: BlockProgress, t: float) -> tuple[str, str] | None:
        """(next block, what was met) when the block's criterion holds, else None."""
        finished = block.finished(t)
        if finished is None:
            return None
        which, met = finished
        if self.first_criterion_trial is None and which in PERFORMANCE_CRITERIA:
            self.first_criterion_trial = self.trials_done
        return block.block.next or self.blocks.following(block.block.name), met

    def _block_time_up(self, t: float) -> None:
        """A timed block ran out: cut the trial in progress short and move to the next block."""
        block = self.blocks.current
        assert block is not None
        trial = self._trial
        if trial is not None:
            if trial.plan is not None and trial.plan.on_leave is not None:
                self._apply(trial.plan.on_leave, t)
            trial.plan = None  # already left
            self._end_trial(trial, t, interrupted=False, cut="block time")
            return  # _end_trial ran the block criterion
        moving_on = self._block_criterion(block, t)
        if moving_on is None:
            return
        nxt, met = moving_on
        if nxt == END_SESSION:
            self._end_session(t, f"protocol complete ({block.block.name}: {met})")
        else:
            self._enter_block(self.blocks.named(nxt), t, met)

    def _next_iti(self, block_name: str) -> float:
        drawn = self._itis[block_name].draw()  # drawn even when overridden: keeps draws aligned
        iti = self.iti_fixed if self.iti_fixed is not None else self.iti_scale * drawn
        bounds = self.protocol.iti_bounds
        if bounds is not None:
            iti = min(max(iti, bounds[0]), bounds[1])
        return iti

    def _session_end_due(self, t: float) -> str | None:
        if self._cap_reached:
            return "reward cap reached"
        if self.limits.max_trials is not None and self.trials_done >= self.limits.max_trials:
            return "trial limit reached"
        return None

    def _enter_block(self, block: Block, t: float, why: str) -> None:
        self._records.append(self.blocks.enter(block, t, why))
        self._log(t, "block", block.name, detail={"why": why})

    def _end_session(self, t: float, reason: str) -> None:
        if self.finished:
            return
        trial = self._trial
        if trial is not None:
            self._end_trial(trial, t, interrupted=True)
        self.finished = True
        self.end_reason = reason
        self.ended_at = t
        self.blocks.close()
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
            block = self.blocks.current
            if block is not None and block.block.withhold_outcomes:
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
