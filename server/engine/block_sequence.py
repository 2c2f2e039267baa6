"""The blocks of one session: the block in progress, those left behind, reversals and probes.

Everything a block criterion or a rule changes about blocks lives here, so the session
core only asks ("enter this block", "what follows it", "when does it run out").
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np

from server.engine.block_progress import BlockProgress
from server.engine.records import BlockStarted
from server.protocol.model import END_SESSION, Block, BlockEnd, Protocol


class BlockSequence:
    def __init__(self, protocol: Protocol, rng: np.random.Generator):
        self.protocol = protocol
        self.rng = rng
        self.current: BlockProgress | None = None
        self.entered = 0
        self.reversals = 0
        # Session time at which the current block's time criterion runs out (inf without
        # one), kept up to date whenever the block or its start time changes.
        self.end_time = math.inf
        # (block, trials, criterion met or None) for each block left; rehearsal reports it
        self.log: list[tuple[str, int, str | None]] = []
        self._swaps: list[tuple[str, str]] = []  # reversals so far, applied to every later block
        self._probes: dict[str, Block] = {}  # probe blocks made by rules, by name
        self._order = [b.name for b in protocol.blocks]

    def enter(self, block: Block, t: float, why: str) -> BlockStarted:
        """Leave the current block (logged with `why`) and start `block` at time t."""
        before = self.best_options()
        if self.current is not None:
            self.log.append((self.current.block.name, self.current.trials, why))
        self.entered += 1
        self.current = BlockProgress(self.protocol, block, self.entered, t, self.rng, self._swaps)
        self.reset_end_time()
        self._count_reversal(before)
        return BlockStarted(t, block.name, self.entered, dict(self.current.contingencies), block.withhold_outcomes)

    def close(self) -> None:
        """The session ended: the block in progress is left without a criterion."""
        if self.current is not None:
            self.log.append((self.current.block.name, self.current.trials, None))

    def reset_end_time(self) -> None:
        block = self.current
        if block is None or block.block.until.minutes is None:
            self.end_time = math.inf
        else:
            self.end_time = block.t0 + block.block.until.minutes * 60.0

    def shift(self, seconds: float) -> None:
        """Move the block's start by a pause, so a timed block ends later by as much."""
        if self.current is not None:
            self.current.t0 += seconds
            self.reset_end_time()

    # ------------------------------------------------------------ what comes next

    def following(self, name: str) -> str:
        """The block after `name` in the protocol, or where a rule's probe said to go."""
        if name not in self._order:
            return self._probes[name].next or END_SESSION
        i = self._order.index(name)
        return self._order[i + 1] if i + 1 < len(self._order) else END_SESSION

    def named(self, name: str) -> Block:
        return self._probes.get(name) or self.protocol.block(name)

    # ------------------------------------------------------------ contingencies

    def best_options(self) -> frozenset[str]:
        """Options with the highest reward probability now (empty when all are equal)."""
        if self.current is None or not self.current.contingencies:
            return frozenset()
        c = self.current.contingencies
        top = max(c.values())
        return frozenset(k for k, v in c.items() if v == top) if top > min(c.values()) else frozenset()

    def _count_reversal(self, before: frozenset[str]) -> None:
        after = self.best_options()
        if before and after and after != before:
            self.reversals += 1

    def reverse(self, a: str, b: str) -> None:
        """Swap two options' contingencies for the rest of the session (a reversal)."""
        self._swaps.append((a, b))
        if self.current is not None:
            before = self.best_options()
            self.current.swap(a, b)
            self._count_reversal(before)

    # ------------------------------------------------------------ probes

    def make_probe(self, minutes: float, then: str | None) -> Block:
        """An extinction probe of the current block: its trials with every outcome withheld,
        for `minutes`; then block `then`, or the end of the session when None."""
        assert self.current is not None
        base = self.current.block
        probe = replace(
            base, name=f"{base.name}:probe", until=BlockEnd(minutes=minutes),
            next=then or END_SESSION, withhold_outcomes=True,
        )  # fmt: skip
        self._probes[probe.name] = probe
        return probe

    @property
    def in_probe(self) -> bool:
        return self.current is not None and self.current.block.name in self._probes
