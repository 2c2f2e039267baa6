"""Closed-loop rules: after every trial, evaluate each rule's condition and decide.

Evaluation is a pure function of (metrics, estimate, rule state). A rule that fires hands
the session a `RuleDecision` (its actions as data and every value its condition read); the
session carries it out and records the firing. Hysteresis (`hold_for`), cooldown and a cap
on firings keep a noisy metric from flapping the schedule.
"""

from __future__ import annotations

import operator
from collections.abc import Callable, Iterator
from dataclasses import dataclass

from server.engine.records import TrialOutcome
from server.engine.seams import RuleDecision, SessionView
from server.protocol.expressions import Arithmetic, Compare, Logic, Negate, Node, Not, Number, Quantity
from server.protocol.model import SCHEDULE_ACTIONS, Protocol, Rule
from server.rules.metrics import SessionMetrics

_COMPARE = {"<": operator.lt, "<=": operator.le, ">": operator.gt, ">=": operator.ge,
            "==": operator.eq, "!=": operator.ne}  # fmt: skip
_ARITH = {"+": operator.add, "-": operator.sub, "*": operator.mul}
# "Prefers" an option: chooses it with probability at least this on the next trial.
PREFERENCE_LEVEL = 0.75


Getter = Callable[[SessionMetrics, SessionView, TrialOutcome], "float | None"]


def compile_condition(node: Node) -> Getter:
    """A condition tree as one function of (metrics, session, trial), built once per rule
    book. None propagates through arithmetic and comparisons with an unknown value are
    False, so a rule never fires on a quantity not known yet."""
    if isinstance(node, Number):
        value = node.value
        return lambda m, s, t: value
    if isinstance(node, Quantity):
        return quantity_getter(node)
    if isinstance(node, Negate):
        inner = compile_condition(node.operand)

        def negate(m, s, t):
            v = inner(m, s, t)
            return None if v is None else -v

        return negate
    if isinstance(node, (Arithmetic, Compare)):
        left, right = compile_condition(node.left), compile_condition(node.right)
        unknown = False if isinstance(node, Compare) else None
        op = _COMPARE.get(node.op) or _ARITH.get(node.op) or _divide

        def binary(m, s, t):
            a, b = left(m, s, t), right(m, s, t)
            return unknown if a is None or b is None else op(a, b)

        return binary
    if isinstance(node, Not):
        inner = compile_condition(node.operand)
        return lambda m, s, t: not inner(m, s, t)
    assert isinstance(node, Logic)
    parts = [compile_condition(part) for part in node.parts]
    if node.op == "and":
        return lambda m, s, t: all(part(m, s, t) for part in parts)
    return lambda m, s, t: any(part(m, s, t) for part in parts)


def _divide(a: float, b: float) -> float | None:
    return None if b == 0 else a / b


def quantity_getter(q: Quantity) -> Getter:
    """How to read one quantity after a trial; the dispatch on its kind is done once, when
    the rule book is built, not after every trial."""
    name = q.name
    if q.setting:
        return lambda m, s, t: s.protocol.settings[name]
    if q.field is not None:
        field = q.field

        def parameter(m: SessionMetrics, s: SessionView, t: TrialOutcome) -> float | None:
            estimate = s.estimate  # summarised on demand: costly, so only when read
            if estimate is None or name not in estimate.params:
                return None
            return float(getattr(estimate.params[name], field))

        return parameter
    if q.window is not None:
        window, method = q.window, getattr(SessionMetrics, name)
        return lambda m, s, t: method(m, window)
    simple = _SIMPLE.get(name)
    if simple is not None:
        return simple
    if name == "p_prefers_correct":
        return _p_prefers_correct

    def from_estimate(m: SessionMetrics, s: SessionView, t: TrialOutcome) -> float | None:
        estimate = s.estimate
        value = None if estimate is None else getattr(estimate, name)
        return None if value is None else float(value)

    return from_estimate


def _p_prefers_correct(m: SessionMetrics, s: SessionView, t: TrialOutcome) -> float | None:
    best = s.best_options()
    estimator = s.estimator
    if not best or estimator is None or s.trials_done == 0:
        return None
    asked = (estimator.p_choice_at_least(o, PREFERENCE_LEVEL) for o in best)
    found = [p for p in asked if p is not None]
    return max(found) if found else 0.0


_SIMPLE: dict[str, Getter] = {
    "streak": lambda m, s, t: float(m.streak),
    "rewards": lambda m, s, t: float(s.rewards),
    "rewarded_responses": lambda m, s, t: float(m.rewarded_trials),
    "minutes": lambda m, s, t: t.t_end / 60.0,
    "trials": lambda m, s, t: float(s.trials_done),
    "block_trials": lambda m, s, t: float(s.block.trials) if s.block is not None else None,
    "reversals": lambda m, s, t: float(s.reversals),
    "pca": lambda m, s, t: m.pca(),
}


@dataclass
class _RuleState:
    run: int = 0  # consecutive evaluations the condition has held
    fired: int = 0
    last_fired_trial: int | None = None


class RuleBook:
    """The protocol's rules for one session, run after every finished trial."""

    def __init__(self, protocol: Protocol):
        self.rules = protocol.rules
        self.metrics = SessionMetrics(protocol)
        self.state = {rule.name: _RuleState() for rule in self.rules}
        self._reads = {rule.name: [(q.label, quantity_getter(q)) for q in rule.reads] for rule in self.rules}
        self._conditions = {rule.name: compile_condition(rule.condition) for rule in self.rules}
        self._changes = {rule.name: any(a.kind in SCHEDULE_ACTIONS for a in rule.actions) for rule in self.rules}

    def after_trial(self, trial: TrialOutcome, session: SessionView) -> Iterator[RuleDecision]:
        """Evaluate every rule in order after `trial`. Only the first rule that changes the
        schedule (reverse, switch_block, probe, end_session) fires; later ones that would
        are held back to the next trial, so two rules can never undo each other's reversal.
        The session carries out each decision before the next rule is read."""
        self.metrics.add(trial)
        reversals = session.reversals
        schedule_changed = False
        for rule in self.rules:
            if session.finished:
                return
            changes = self._changes[rule.name]
            decision = self._consider(rule, self.state[rule.name], session, trial, not (changes and schedule_changed))
            if decision is not None:
                yield decision
                schedule_changed = schedule_changed or changes
        if session.reversals != reversals:
            self.metrics.streak = 0  # correctness is judged against the new contingencies

    def _consider(
        self, rule: Rule, state: _RuleState, session: SessionView, trial: TrialOutcome, allowed: bool
    ) -> RuleDecision | None:
        metrics = self.metrics
        state.run = state.run + 1 if self._conditions[rule.name](metrics, session, trial) else 0
        if not allowed or state.run < rule.hold_for:
            return None
        if session.in_probe and any(a.kind == "probe" for a in rule.actions):
            return None  # a probe already runs: starting it again would never let it end
        if rule.max_firings is not None and state.fired >= rule.max_firings:
            return None
        if state.last_fired_trial is not None and trial.trial - state.last_fired_trial <= rule.cooldown:
            return None
        state.fired += 1
        state.last_fired_trial = trial.trial
        state.run = 0
        # what the condition read (reads are pure, so reading again gives the same values)
        values = {label: get(metrics, session, trial) for label, get in self._reads[rule.name]}
        return RuleDecision(rule.name, rule.actions, values, self._changes[rule.name])

    def firings(self) -> dict[str, int]:
        return {name: state.fired for name, state in self.state.items()}
