"""What each box looks like right now: kept up to date from its session's record stream,
and turned into the plain facts the status page's process is fed.

Facts hold no clock reading of their own: times are session seconds, and the feed sends
"now" beside them (server/lab/page_feed.py); the page adds the time since it received them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, TypedDict

from server.engine.records import EventLogged, Record, RuleFired, SessionEnded, TrialRecord
from server.engine.session import Session
from server.lab.rule_words import firing_words
from server.protocol.model import Rule


class RuleShown(TypedDict):
    t: float
    text: str


class BoxFacts(TypedDict):
    """One box as the lab sends it to the page (JSON); equal facts mean an unchanged tile."""

    box: str
    animal: str
    protocol: str
    session_id: int
    finished: bool
    ended_at: float | None
    paused: bool
    block: str | None
    step: str | None
    trial: int
    trials_done: int
    rewards: int
    max_rewards: int  # the session's reward cap (protocol limit within the lab's hard cap)
    reversals: int  # rule firings so far that reversed the options
    scored: int
    correct: int
    limit_s: float
    last_input_t: float | None
    link_lost: bool
    last_rule: RuleShown | None
    end_reason: str | None
    cap_reached: bool
    rule_alarm: str | None


class BoxStatus:
    """What a status view needs of one box, from its records (constant time per record)."""

    def __init__(self) -> None:
        self.last_trial: TrialRecord | None = None
        self.ended: SessionEnded | None = None
        self.last_input_t: float | None = None  # session time of the last input onset
        self.last_rule: RuleFired | None = None
        self.last_alarm: EventLogged | None = None  # the last alarm a rule raised
        self.alarms = 0  # alarms rules raised this session (the same message may come again)
        self.link_lost = False
        self.cap_reached = False
        self.scored = 0  # trials where correctness applies
        self.correct = 0
        self.reversals = 0  # rule firings that reversed the options
        self.records_seen = 0  # lets a status view skip a box whose session said nothing new

    def observe(self, record: Record) -> None:
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
                self.alarms += 1
            elif kind in ("link_lost", "link_restored"):
                self.link_lost = kind == "link_lost"
            elif kind == "cap":
                self.cap_reached = True
        elif isinstance(record, SessionEnded):
            self.ended = record
        elif isinstance(record, RuleFired):
            self.last_rule = record
            self.reversals += reverses(record.actions)


def reverses(actions: Any) -> bool:
    """Whether a rule firing (its actions as recorded or stored) reversed the options."""
    return any(isinstance(a, dict) and "reverse" in a for a in actions or ())


def rule_text(rule: Any, actions: Any, reads: dict[str, Any] | None = None, spec: Rule | None = None) -> str:
    """A rule firing in words (server/lab/rule_words.py), with why when the values it read
    and the rule as written are at hand."""
    return firing_words(str(rule), actions, reads, spec)


def alarm_message(detail: Any) -> str | None:
    """The message of a rule's alarm event, from its stored detail."""
    if isinstance(detail, dict) and detail.get("message"):
        return str(detail["message"])
    return None


# End reasons of a session that ran its course; anything else ended it early.
# "time limit" is how databases before the run time limit had its own words spelled it.
_NORMAL_ENDS = ("session time limit", "protocol complete", "trial limit reached", "run time limit", "time limit")
CAP_REASON = "reward cap reached"


@dataclass(frozen=True, slots=True)
class Alarm:
    kind: str  # link_lost, no_response, cap_reached, ended_early, rule_alarm
    text: str


def ended_early(reason: str | None) -> bool:
    if reason is None or reason == CAP_REASON:
        return False
    return not any(reason == normal or reason.startswith(normal + " ") for normal in _NORMAL_ENDS)


def alarms_for(
    *,
    running: bool,
    paused: bool,
    link_lost: bool,
    silent_s: float | None,
    cap_reached: bool,
    end_reason: str | None,
    quiet_after_s: float,
    rule_alarm: str | None = None,
) -> list[Alarm]:
    """The alarms of one box. `silent_s` is the time since the last input onset (or since
    the start when there was none); a paused or ended session raises no silence alarm.
    `rule_alarm` is the message of the last alarm a protocol rule raised (while running)."""
    found = []
    if link_lost and running:
        found.append(Alarm("link_lost", "link lost"))
    if running and not paused and silent_s is not None and silent_s >= quiet_after_s:
        found.append(Alarm("no_response", f"no response for {silent_s / 60:.0f} min"))
    if cap_reached or end_reason == CAP_REASON:
        found.append(Alarm("cap_reached", "reward cap reached"))
    if ended_early(end_reason):
        found.append(Alarm("ended_early", f"ended early: {end_reason}"))
    if rule_alarm and running:
        found.append(Alarm("rule_alarm", f"rule alarm: {rule_alarm}"))
    return found


def _fired_text(fired: RuleFired, session: Session) -> str:
    spec = next((r for r in session.protocol.rules if r.name == fired.rule), None)
    return rule_text(fired.rule, fired.actions, fired.values, spec)


def box_facts(
    box: str,
    animal: str,
    session_id: int,
    session: Session,
    status: BoxStatus,
    connected: bool,
    run_limit_s: float | None = None,
) -> BoxFacts:
    """The facts of one running box (read on the lab's loop, sent to the page's process).

    `run_limit_s` is the run's own bound (`--minutes`), in session seconds: the session
    ends at whichever comes first, its cap or the run's limit, and "time left" says so."""
    finished = session.finished
    rule = status.last_rule
    alarm = status.last_alarm
    block = session.block
    return {
        "box": box,
        "animal": animal,
        "protocol": session.protocol.name,
        "session_id": session_id,
        "finished": finished,
        "ended_at": session.ended_at if finished else None,
        "paused": session.paused and not finished,
        "block": block.block.name if block is not None else None,
        "step": None if finished else session.step_name,
        "trial": session.trial_index,
        "trials_done": session.trials_done,
        "rewards": session.rewards,
        "max_rewards": session.limits.max_rewards,
        "reversals": status.reversals,
        "scored": status.scored,
        "correct": status.correct,
        "limit_s": min(session.limits.max_minutes * 60.0, run_limit_s if run_limit_s is not None else math.inf),
        "last_input_t": status.last_input_t,
        "link_lost": bool(status.link_lost or not connected),
        "last_rule": None if rule is None else {"t": rule.t, "text": _fired_text(rule, session)},
        "end_reason": session.end_reason,
        "cap_reached": status.cap_reached,
        "rule_alarm": None if alarm is None else alarm_message(alarm.detail),
    }
