"""Host commands awaiting acknowledgement, and which to resend when.

A command keeps its id through every resend, so the device (which remembers recent ids)
carries it out once however often it arrives. Ids start from a caller-chosen value: pick a
fresh random one per link session, so a restarted host never reuses an id the device still
remembers from before.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

from server.link.codec import U32_MAX
from server.link.messages import DriveCommand, HostCommand, PulseCommand


@dataclass(frozen=True, slots=True)
class Pending:
    command: HostCommand
    first_sent_s: float
    last_sent_s: float
    attempts: int  # sends so far; a clock-sync sample needs exactly 1 (Karn & Partridge 1987)


@dataclass(frozen=True, slots=True)
class ResendPlan:
    resend: tuple[HostCommand, ...]  # send these again now (marked as sent)
    given_up: tuple[Pending, ...]  # sent max_attempts times without an ack; no longer tracked


class PendingCommands:
    """Tracks unacknowledged commands by id; pure, the current time is passed in."""

    def __init__(self, first_id: int = 1, resend_after_s: float = 0.25, max_attempts: int = 8) -> None:
        if not 1 <= first_id <= U32_MAX:
            raise ValueError(f"first command id out of range 1..{U32_MAX}: {first_id}")
        if resend_after_s <= 0 or max_attempts < 1:
            raise ValueError("resend_after_s must be > 0 and max_attempts >= 1")
        self.resend_after_s = resend_after_s
        self.max_attempts = max_attempts
        self._next_id = first_id
        self._pending: dict[int, Pending] = {}  # insertion order = send order

    def next_id(self) -> int:
        """A fresh command id (ids are never reused within one tracker)."""
        if self._next_id > U32_MAX:
            raise ValueError("command ids exhausted: start a new link session")
        cid = self._next_id
        self._next_id += 1
        return cid

    def sent(self, command: HostCommand, now: float) -> None:
        """Record the first send of `command`."""
        if command.command_id in self._pending:
            raise ValueError(f"command id already pending: {command.command_id}")
        self._pending[command.command_id] = Pending(command, now, now, 1)

    def supersede(self, command: DriveCommand | PulseCommand) -> tuple[Pending, ...]:
        """Stop resending older commands that `command` makes stale; returns them.

        A resend can arrive after a newer command for the same output: a `set 1 1` lost twice
        and resent after the `set 1 0` that followed it would leave the lever out. A new
        `set` replaces any pending `set` or `pulse` on its channel (a set cancels a pulse on
        the device too); a new `pulse` replaces a pending `set` there, but not another pulse
        (each pulse is a pellet the session counted).
        """
        stale = [
            cid
            for cid, p in self._pending.items()
            if isinstance(p.command, (DriveCommand, PulseCommand))
            and p.command.channel == command.channel
            and (isinstance(command, DriveCommand) or isinstance(p.command, DriveCommand))
        ]
        return tuple(self._pending.pop(cid) for cid in stale)

    def acknowledge(self, command_id: int) -> Pending | None:
        """Forget an acknowledged command; None for an unknown id (a late repeat ack)."""
        return self._pending.pop(command_id, None)

    def due(self, now: float) -> ResendPlan:
        """Commands whose resend time has come, and those that have run out of attempts."""
        resend: list[HostCommand] = []
        given_up: list[Pending] = []
        for cid, p in list(self._pending.items()):
            if now - p.last_sent_s < self.resend_after_s:
                continue
            if p.attempts >= self.max_attempts:
                given_up.append(self._pending.pop(cid))
            else:
                self._pending[cid] = replace(p, last_sent_s=now, attempts=p.attempts + 1)
                resend.append(p.command)
        return ResendPlan(tuple(resend), tuple(given_up))

    def resend_all(self, now: float) -> tuple[HostCommand, ...]:
        """Every pending command, marked as sent now (after a reconnect)."""
        for cid, p in self._pending.items():
            self._pending[cid] = replace(p, last_sent_s=now, attempts=p.attempts + 1)
        return tuple(p.command for p in self._pending.values())

    def next_deadline(self) -> float | None:
        """When `due` next has something to do, None when nothing is pending."""
        if not self._pending:
            return None
        return min(p.last_sent_s for p in self._pending.values()) + self.resend_after_s

    def __len__(self) -> int:
        return len(self._pending)

    def __contains__(self, command_id: int) -> bool:
        return command_id in self._pending
