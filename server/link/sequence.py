"""Gap and duplicate detection on the device's event stream, and when to ask for a replay.

Events are accepted strictly in sequence order. An event beyond a gap is dropped (the device
still holds it and resends it in the replay), so what the host keeps has no gaps, no
duplicates and keeps device order.
"""

from __future__ import annotations

from enum import Enum


class Verdict(Enum):
    ACCEPT = "accept"  # the next event: keep it
    DUPLICATE = "duplicate"  # already kept: drop it
    AHEAD = "ahead"  # beyond a gap: drop it, a replay will bring it back in order


class SequenceTracker:
    """Follows device sequence numbers; pure, time passed in.

    `next_seq` is the first event wanted: 1 for a freshly booted device, or one past the
    identity's `seq` when a session starts on a device that already has history.
    `holdoff_s` is how long a replay request stands before the same one is asked again.
    A device restart (a new boot id) starts its numbers again: start a new tracker then.
    """

    def __init__(self, next_seq: int = 1, holdoff_s: float = 0.5) -> None:
        if next_seq < 1:
            raise ValueError(f"next sequence number must be at least 1: {next_seq}")
        self.expected = next_seq
        self.holdoff_s = holdoff_s
        self.duplicates = 0
        self.dropped_ahead = 0
        self.lost = 0  # events the device no longer held when asked (skipped over)
        self._newest_seen = next_seq - 1  # highest seq the device has shown us
        self._asked: tuple[int, float] | None = None  # (from seq, when) of the standing request
        self._force = False  # ask once even with nothing known missing (after a reconnect)

    def on_event(self, seq: int) -> Verdict:
        """Judge an event line's sequence number."""
        if seq < self.expected:
            self.duplicates += 1
            return Verdict.DUPLICATE
        if seq > self.expected:
            self.dropped_ahead += 1
            self._newest_seen = max(self._newest_seen, seq)
            return Verdict.AHEAD
        self.expected += 1
        self._newest_seen = max(self._newest_seen, seq)
        return Verdict.ACCEPT

    def on_mark(self, last_seq: int) -> None:
        """Note the 'last event written' number carried by a beat, ack or identity line."""
        self._newest_seen = max(self._newest_seen, last_seq)

    @property
    def newest_seen(self) -> int:
        """The highest sequence number the device has shown: on an event or as its last written."""
        return self._newest_seen

    @property
    def missing(self) -> bool:
        """True while the device has shown events we have not accepted."""
        return self._newest_seen >= self.expected

    def replay_from(self, now: float) -> int | None:
        """The seq to ask a replay from now, or None; a returned request is taken as sent."""
        if not self.missing and not self._force:
            self._asked = None
            return None
        self._force = False
        if self._asked is not None:
            asked_seq, asked_at = self._asked
            if asked_seq == self.expected and now - asked_at < self.holdoff_s:
                return None
        self._asked = (self.expected, now)
        return self.expected

    def skip_to(self, seq: int) -> int:
        """The device no longer holds events before `seq`: give them up; returns how many."""
        gone = max(0, seq - self.expected)
        if gone:
            self.lost += gone
            self.expected = seq
        return gone

    def reconnected(self) -> None:
        """After a reconnect, ask for a replay from `expected` at once, missing or not."""
        self._asked = None
        self._force = True
