"""Which alarms hold now, and which of their changes become messages (no I/O, no clock).

The lab hands `AlarmWatch.update` the whole set of conditions that hold at time `now` (one
entry per box and kind, plus the lab-wide store and disk); the watch answers with the
messages to send:

- a condition that starts is `raised`, at most once per `repeat_s` for one box and kind;
  a raise within that window is counted, not sent, and the count rides on the next message;
- a condition still holding `repeat_s` after its last message is said again (`still`);
- a condition that ends after its raise was sent gets its `cleared` ("all clear"); one whose
  raise was held back ends silently (the count says it happened);
- kinds that are events rather than states (a rule's alarm, a session that ended early, the
  reward cap) are raised and never cleared.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from server.lab.config_alarms import ALARM_KINDS

ONE_SHOT_KINDS = frozenset({"rule_alarm", "ended_early", "cap_reached"})
LAB_WIDE = ""  # the `box` of the store's and the disk's alarms


@dataclass(frozen=True, slots=True)
class AlarmNote:
    """One message for the people on call."""

    kind: str  # a key of ALARM_KINDS
    box: str  # LAB_WIDE for the store and the disk
    state: str  # raised, still or cleared
    text: str  # what holds ("link lost"; for cleared: what held)
    since_s: float  # how long the condition has held (0 when raised)
    repeats: int = 0  # raises held back since the previous message of this box and kind

    def line(self) -> str:
        """The message in one line, as people read it."""
        where = f"{self.box}: " if self.box else ""
        if self.state == "raised":
            said = self.text
        elif self.state == "still":
            said = f"still {self.text} (for {_duration(self.since_s)})"
        else:
            said = f"all clear: {ALARM_KINDS[self.kind]} is over (after {_duration(self.since_s)})"
        more = f"; {self.repeats} more time{'s' if self.repeats != 1 else ''} since the last message" if (
            self.repeats) else ""  # fmt: skip
        return f"{where}{said}{more}"


def _duration(seconds: float) -> str:
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 90 * 60:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


@dataclass(slots=True)
class _Held:
    text: str
    since: float  # when this episode began
    said: bool  # this episode's raise (or a reminder) was sent


class AlarmWatch:
    def __init__(self, repeat_s: float):
        self.repeat_s = repeat_s
        self._active: dict[tuple[str, str], _Held] = {}
        self._last_sent: dict[tuple[str, str], float] = {}
        self._held_back: dict[tuple[str, str], int] = {}
        self._seen_once: set[tuple[str, str, str, int]] = set()  # one-shots (box, kind, text, occurrence) raised

    def active(self) -> dict[tuple[str, str], str]:
        """(box, kind) -> text of every condition holding now."""
        return {key: held.text for key, held in self._active.items()}

    def update(
        self,
        now: float,
        holding: Mapping[tuple[str, str], str],
        occurrences: Mapping[tuple[str, str], int] | None = None,
    ) -> list[AlarmNote]:
        """The messages due at `now`, given every (box, kind) -> text that holds now.

        `occurrences` tells one event of a one-shot kind from the next with the same text
        (a rule that raises the same alarm again later in the session)."""
        notes: list[AlarmNote] = []
        for key, text in holding.items():
            box, kind = key
            assert kind in ALARM_KINDS, kind
            held = self._active.get(key)
            if kind in ONE_SHOT_KINDS:
                seen = (box, kind, text, (occurrences or {}).get(key, 0))
                if seen not in self._seen_once:
                    self._seen_once.add(seen)
                    self._active[key] = _Held(text, now, False)
                    self._raise(key, now, notes, "raised")
                continue
            if held is None:
                self._active[key] = _Held(text, now, False)
                self._raise(key, now, notes, "raised")
            else:
                held.text = text
                if now - self._last_sent.get(key, -float("inf")) >= self.repeat_s:
                    if not held.said:  # its raise was counted as held back; it is sent now
                        self._held_back[key] = max(0, self._held_back.get(key, 0) - 1)
                    self._raise(key, now, notes, "still" if held.said else "raised")
        for key in [k for k in self._active if k not in holding]:
            held = self._active.pop(key)
            if held.said and key[1] not in ONE_SHOT_KINDS:
                notes.append(AlarmNote(key[1], key[0], "cleared", held.text, now - held.since))
        return notes

    def _raise(self, key: tuple[str, str], now: float, notes: list[AlarmNote], state: str) -> None:
        held = self._active[key]
        last = self._last_sent.get(key)
        if last is not None and now - last < self.repeat_s:
            self._held_back[key] = self._held_back.get(key, 0) + 1
            return
        repeats = self._held_back.pop(key, 0)
        notes.append(
            AlarmNote(key[1], key[0], state, held.text, now - held.since if state == "still" else 0.0, repeats)
        )
        self._last_sent[key] = now
        held.said = True
