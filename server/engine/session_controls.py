"""What can be done to a running session from outside its protocol: an operator's pause
and resume, and the closed-loop actions rules take (reversal, block switch, probe, ITI,
alarm, note, end).

A mixin of `Session` (server/engine/session.py), split out to keep each file about one
thing; it uses the session's own state and helpers, and is equally free of I/O and clocks.
"""

from __future__ import annotations

from dataclasses import replace

from server.engine.records import Command, Record
from server.protocol.model import END_SESSION, BlockEnd


class SessionControls:
    @property
    def paused(self) -> bool:
        return self._paused_at is not None

    def pause(self, t: float, origin: str = "operator") -> list[Command]:
        """Freeze the session clock and put outputs in their safe state until `resume`.

        Inputs during a pause are logged but change nothing. The session time limit keeps
        running: it bounds the animal's time in the box, paused or not.
        """
        if self.finished or self._paused_at is not None:
            return []
        self._catch_up(t)
        if self.finished:
            return self._flush()
        self._paused_at = t
        self._resume_outputs = set(self.active_outputs)
        for command in self.safe_state():
            self._switch(command.name, command, t)
        self._log(t, "pause", "session", detail={"origin": origin})
        return self._flush()

    def resume(self, t: float, origin: str = "operator") -> list[Command]:
        """Continue where the pause left off: every pending deadline moves by the pause."""
        if self.finished or self._paused_at is None:
            return []
        shift = t - self._paused_at
        self._paused_at = None
        trial = self._trial
        if trial is not None:
            trial.deadline += shift
            trial.step_t0 += shift
            if trial.schedule is not None:
                trial.schedule.armed_at += shift
        else:
            self._iti_end += shift
        if self.block is not None:
            self.block.t0 += shift
            self._reset_block_end()
        for name in sorted(self._resume_outputs):
            self._set(name, True, t)
        self._log(t, "resume", "session", detail={"origin": origin, "paused_s": shift})
        return self._flush()

    # ------------------------------------------------------------ closed-loop actions

    def reverse(self, a: str, b: str, t: float) -> None:
        """Swap two options' contingencies for the rest of the session (a reversal)."""
        self._extra_swaps.append((a, b))
        if self.block is not None:
            before = self.best_options()
            self.block.swap(a, b)
            self._count_reversal(before)
        self._log(
            t, "block", "reversal", detail={"swap": [a, b], "now": dict(self.block.contingencies) if self.block else {}}
        )

    def switch_block(self, name: str, t: float, why: str = "rule") -> None:
        """Leave the current block after the trial in progress; the next trial starts `name`."""
        self._enter_block(self.protocol.block(name), t, why)

    def start_probe(self, minutes: float, then: str | None, t: float, why: str = "rule") -> None:
        """An extinction probe: the current block's trials with every outcome withheld, for
        `minutes`; then block `then`, or the end of the session when None."""
        assert self.block is not None
        base = self.block.block
        probe = replace(
            base, name=f"{base.name}:probe", until=BlockEnd(minutes=minutes),
            next=then or END_SESSION, withhold_outcomes=True,
        )  # fmt: skip
        self._probe_blocks[probe.name] = probe
        self._itis.setdefault(probe.name, self._itis[base.name])
        self._enter_block(probe, t, why)

    @property
    def in_probe(self) -> bool:
        return self.block is not None and self.block.block.name in self._probe_blocks

    def set_iti(self, seconds: float) -> None:
        """Every following ITI is `seconds` (within the protocol's iti_bounds)."""
        self.iti_fixed = seconds
        self.iti_scale = 1.0

    def scale_iti(self, factor: float) -> None:
        """Multiply following ITIs by `factor` (cumulative; the result stays within iti_bounds)."""
        self.iti_scale *= factor

    def alarm(self, message: str, t: float, source: str = "rule") -> None:
        self._log(t, "alarm", source, detail={"message": message})
        self.alarms.append((t, message))

    def note(self, text: str, t: float, source: str = "rule") -> None:
        self._log(t, "note", source, detail={"text": text})

    def add_record(self, record: Record) -> None:
        """Let an observer (the rules) put its own record into the session's stream."""
        self._records.append(record)

    def mark_interrupted(self, reason: str) -> None:
        """Flag the trial in progress as interrupted (e.g. the box link was lost during it);
        it runs to its end as usual and is stored with interrupted = true."""
        if self._trial is not None:
            self._trial.cut_reason = reason

    def end_after_trial(self, reason: str) -> None:
        self._pending_end = reason
