"""Ending a run cleanly on SIGINT/SIGTERM: the one place Vigil takes over those signals.

A handler on the event loop (not `signal.signal`) runs between callbacks, so it can ask the
sessions to stop instead of raising KeyboardInterrupt in the middle of a store commit.
"""

from __future__ import annotations

import asyncio
import contextlib
import signal
from collections.abc import Callable, Iterator

STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)


@contextlib.contextmanager
def on_stop_signals(
    loop: asyncio.AbstractEventLoop,
    handler: Callable[[signal.Signals], None],
    signals: tuple[signal.Signals, ...] = STOP_SIGNALS,
) -> Iterator[list[signal.Signals]]:
    """Call `handler(sig)` on the loop for each of `signals` while the block runs; yields
    the signals actually taken (none outside the main thread, where the loop cannot)."""
    taken: list[signal.Signals] = []
    for sig in signals:
        try:
            loop.add_signal_handler(sig, handler, sig)
            taken.append(sig)
        except (NotImplementedError, RuntimeError):  # not the main thread
            pass
    try:
        yield taken
    finally:
        for sig in taken:
            loop.remove_signal_handler(sig)
